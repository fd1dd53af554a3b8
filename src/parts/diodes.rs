//! Diode profiles: the Shockley figures of one diode, built in or from a patch
//! (`[diodes.NAME]`).
//!
//! A diode is `I = is (exp(Vj / (n Vt)) - 1)` at its junction voltage `Vj`, in series with
//! `rs`, with an optional junction capacitance `cj` across the junction; `Vt = k T / q`
//! follows `[patch] temperature`. The built-in profiles carry generic names of our own and
//! figures typical of their class, from memory (not any one product's datasheet).

/// Elementary charge, C (exact since the 2019 SI).
pub const ELEMENTARY_CHARGE: f64 = 1.602_176_634e-19;

/// Thermal voltage `k T / q` at `kelvin`, V.
pub fn thermal_voltage(kelvin: f64) -> f64 {
    crate::budget::BOLTZMANN * kelvin / ELEMENTARY_CHARGE
}

/// Figures of one diode (SI units).
#[derive(Debug, Clone, PartialEq)]
pub struct Diode {
    /// Profile name.
    pub name: String,
    /// One-line description.
    pub about: String,
    /// Saturation current, A (> 0).
    pub is: f64,
    /// Emission coefficient (ideality factor), > 0.
    pub n: f64,
    /// Series resistance, ohm (>= 0).
    pub rs: f64,
    /// Junction capacitance, F (0: none).
    pub cj: f64,
}

/// Names of the built-in diode profiles, in display order.
pub fn builtin_names() -> &'static [&'static str] {
    &["silicon-signal", "schottky", "germanium", "led-red"]
}

/// A built-in diode profile by name.
pub fn builtin(name: &str) -> Option<Diode> {
    // Typical of each class, from memory (not from any one datasheet): about 0.6 V at 1 mA
    // for small-signal silicon, 0.25 V for a small Schottky, 0.28 V for germanium, about
    // 1.8 V at 10 mA for a red LED.
    let (about, is, n, rs, cj) = match name {
        "silicon-signal" => (
            "small-signal silicon switching diode",
            2e-9,
            1.8,
            0.6,
            2e-12,
        ),
        "schottky" => (
            "small-signal Schottky barrier diode",
            1e-7,
            1.05,
            2.0,
            10e-12,
        ),
        "germanium" => ("point-contact germanium diode", 2e-7, 1.3, 5.0, 1e-12),
        "led-red" => ("red light-emitting diode", 1e-18, 1.9, 5.0, 20e-12),
        _ => return None,
    };
    Some(Diode {
        name: name.to_string(),
        about: about.to_string(),
        is,
        n,
        rs,
        cj,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn thermal_voltage_at_25_c() {
        // Vt = k T / q, 25.693 mV at 25 C (SI 2019 constants; CHECKS.md).
        let vt = thermal_voltage(298.15);
        assert!((vt - 25.693e-3).abs() < 1e-6, "{vt}");
    }

    #[test]
    fn built_in_diodes_forward_voltages_are_typical_of_their_class() {
        // Forward voltage at 1 mA (10 mA for the LED) from the Shockley law; class ranges
        // from memory: silicon 0.55-0.7 V, Schottky 0.15-0.35 V, germanium 0.2-0.4 V, red
        // LED 1.6-2.1 V.
        let vt = thermal_voltage(298.15);
        for (name, i, lo, hi) in [
            ("silicon-signal", 1e-3, 0.55, 0.7),
            ("schottky", 1e-3, 0.15, 0.35),
            ("germanium", 1e-3, 0.2, 0.4),
            ("led-red", 10e-3, 1.6, 2.1),
        ] {
            let d = builtin(name).unwrap();
            let v = d.n * vt * (i / d.is + 1.0).ln() + i * d.rs;
            assert!(v > lo && v < hi, "{name}: {v}");
        }
        for n in builtin_names() {
            assert!(builtin(n).is_some());
        }
        assert!(builtin("nothing").is_none());
    }
}
