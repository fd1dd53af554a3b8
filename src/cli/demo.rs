//! `railsong demo`: render the built-in demo patch and say what to listen for.

use std::path::Path;

use super::render::render_to;
use super::{Failure, RenderFlags};

/// The demo patch, compiled into the binary (the same file as patches/demo.toml).
pub(crate) const DEMO: &str = include_str!("../../patches/demo.toml");

pub(crate) fn cmd_demo(flags: &RenderFlags) -> Result<(), Failure> {
    let patch = railsong::patch::parse_str(DEMO, "demo.toml", Path::new("."), &[])
        .map_err(Failure::bad_input)?;
    let dir = render_to(&patch, "demo", flags, None)?;
    say!();
    say!("What to listen for (start quietly: the last two are harsh):");
    say!(
        "  {}  the mixer as designed: four voices, nothing happening to them.",
        dir.join("clean.wav").display()
    );
    say!(
        "  {}  the same voices at gain -3: squared-off, buzzy peaks where the mix hits the rails.",
        dir.join("rails.wav").display()
    );
    say!(
        "  {}  a JFET-input follower driven below its input range: upward spikes where it reverses phase.",
        dir.join("reversal.wav").display()
    );
    Ok(())
}
