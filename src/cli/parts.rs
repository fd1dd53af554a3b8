//! `railsong parts`: the built-in op-amp profiles and a patch's own parts.

use std::path::Path;

use railsong::parts::{builtin, builtin_names, OpAmp};
use railsong::units::fmt_eng;

use super::{load, Failure};

pub(crate) fn cmd_parts(path: Option<&Path>, sets: &[String]) -> Result<(), Failure> {
    let mut parts: Vec<(OpAmp, &str)> = builtin_names()
        .iter()
        .filter_map(|n| builtin(n))
        .map(|p| (p, "built-in"))
        .collect();
    if let Some(path) = path {
        let patch = load(path, sets)?;
        let mut seen: Vec<String> = parts.iter().map(|(p, _)| p.name.clone()).collect();
        for st in &patch.stages {
            if let Some(p) = &st.part {
                if !seen.contains(&p.name) {
                    seen.push(p.name.clone());
                    parts.push((p.clone(), "patch"));
                }
            }
        }
    }
    say!("op-amp profiles (built-in figures are typical of their class, not of any one product)");
    say!();
    for (p, origin) in &parts {
        say!("{} ({origin}): {}", p.name, p.about);
        let lim = |v: Option<f64>, side: &str| {
            v.map_or("no limit".to_string(), |d| {
                if d >= 0.0 {
                    format!("{} inside {side}", fmt_eng(d, "V"))
                } else {
                    format!("{} beyond {side}", fmt_eng(-d, "V"))
                }
            })
        };
        say!(
            "    GBW {}  slew {}/us  A0 {}  swing short of rails +{} / -{}  knee {}",
            fmt_eng(p.gbw, "Hz"),
            fmt_eng(p.slew * 1e-6, "V"),
            p.a0.map_or("infinite".into(), |a| format!("{:.0} dB", 20.0 * a.log10())),
            fmt_eng(p.drop_pos, "V"),
            fmt_eng(p.drop_neg, "V"),
            fmt_eng(p.knee, "V"),
        );
        say!(
            "    input range: {} / {}{}",
            lim(p.cm_low, "V-"),
            lim(p.cm_high, "V+"),
            if p.reversal {
                ", reverses phase outside"
            } else {
                ""
            }
        );
        say!(
            "    Vos {}  Ib {}  en {}/rtHz (1/f corner {})  in {}/rtHz  Isc {}  max supply {}",
            fmt_eng(p.vos, "V"),
            fmt_eng(p.ib, "A"),
            fmt_eng(p.en, "V"),
            fmt_eng(p.en_corner, "Hz"),
            fmt_eng(p.inoise, "A"),
            p.isc.map_or("unlimited".into(), |i| fmt_eng(i, "A")),
            if p.supply_max.is_finite() {
                fmt_eng(p.supply_max, "V")
            } else {
                "unlimited".into()
            }
        );
    }
    Ok(())
}
