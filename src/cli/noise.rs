//! `railsong noise`: the analytic noise budget beside a simulated idle render.

use std::path::Path;

use railsong::measure;
use railsong::render::{self};
use railsong::units::fmt_eng;

use super::common::{failure_io, stream_patch};
use super::{load, Failure};

/// Longest idle render behind the simulated noise figure, s (the figure is taken from the
/// last `render::TAIL_MAX` samples: 5.46 s at 48 kHz).
const NOISE_SIM_MAX_S: f64 = 10.0;

pub(crate) fn cmd_noise(
    path: &Path,
    sets: &[String],
    output: Option<&str>,
    json: bool,
) -> Result<(), Failure> {
    let patch = load(path, sets)?;
    let budgets = railsong::budget::try_budget(&patch, railsong::budget::DEFAULT_BAND)
        .map_err(Failure::bad_input)?;
    let picked: Vec<_> = budgets
        .iter()
        .filter(|b| output.is_none_or(|n| n == b.output))
        .collect();
    if picked.is_empty() {
        return Err(Failure::bad_input(format!(
            "--output {}: no such output in {}",
            output.unwrap_or(""),
            path.display()
        )));
    }
    if json {
        say!(
            "{}",
            serde_json::to_string_pretty(&picked).map_err(failure_io)?
        );
        return Ok(());
    }
    say!(
        "{}: noise budget over 20 Hz - 20 kHz at {:.1} C (analytic, from the network's noise gains)",
        patch.title,
        patch.temperature - railsong::units::ZERO_CELSIUS
    );
    // The simulated counterpart: the idle render (sources muted) with circuit noise on.
    let mut idle = render::muted(&patch);
    idle.noise = true;
    // Long enough for the figure (measured on the kept tail, at most render::TAIL_MAX
    // samples), never longer: a 3600 s patch must not cost an hour of idle render here.
    idle.length = idle.length.clamp(2.0, NOISE_SIM_MAX_S);
    let sim = stream_patch(&idle, false, false, &mut |_, _| Ok(()))?;
    for b in picked {
        say!();
        say_raw!("{}", railsong::budget::format_budget(b));
        let k = patch.outputs.iter().position(|o| o.name == b.output);
        let simulated = k
            .and_then(|k| sim.run.outputs.get(k))
            .map(|o| measure::noise_figures(&o.samples, sim.run.rate));
        if let Some(n) = simulated.and_then(|n| n.noise_rms_v) {
            say!(
                "simulated: {:.4} uV rms over 20 Hz - 20 kHz from a {} idle render ({:+.2} dB against the budget)",
                n * 1e6,
                fmt_eng(idle.length, "s"),
                20.0 * (n / b.total_rms).log10()
            );
            // The budget is small-signal: an op-amp that sits at its swing at idle (a
            // comparator, a latched stage) passes no noise in the render.
            let held: Vec<&str> = k
                .map(|k| measure::upstream(&patch, patch.outputs[k].from))
                .unwrap_or_default()
                .into_iter()
                .flat_map(|s| {
                    let name = &patch.stages[s].name;
                    sim.run.events.iter().filter(move |e| {
                        e.clip_s > 0.0
                            && (e.stage == *name || e.stage.starts_with(&format!("{name}.")))
                    })
                })
                .map(|e| e.stage.as_str())
                .collect();
            if !held.is_empty() {
                say!(
                    "note: {} at its swing in the idle render: the budget's small-signal gains do not hold there",
                    held.join(", ")
                );
            }
        }
    }
    Ok(())
}
