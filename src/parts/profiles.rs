//! Op-amp profiles: the behavioural figures of one op-amp, built in or from a patch.
//!
//! The built-in profiles carry generic names of our own and figures *typical of their class*.
//! They are typical values from memory, not any one product's datasheet: define your own
//! `[parts.NAME]` from a datasheet when it matters.

/// Behavioural figures of one op-amp (all SI units).
#[derive(Debug, Clone, PartialEq)]
pub struct OpAmp {
    /// Profile name.
    pub name: String,
    /// One-line description.
    pub about: String,
    /// Gain-bandwidth product, Hz.
    pub gbw: f64,
    /// Slew rate, V/s.
    pub slew: f64,
    /// Open-loop DC gain as a ratio; `None` = infinite.
    pub a0: Option<f64>,
    /// How far short of the positive rail the output can swing, V.
    pub drop_pos: f64,
    /// How far short of the negative rail the output can swing, V.
    pub drop_neg: f64,
    /// Width of the soft knee at each swing limit, V (0 = hard corner).
    pub knee: f64,
    /// Lowest input common-mode voltage, as a distance above the negative rail, V (negative:
    /// the range extends beyond the rail). `None`: no limit.
    pub cm_low: Option<f64>,
    /// Highest input common-mode voltage, as a distance below the positive rail, V. `None`:
    /// no limit.
    pub cm_high: Option<f64>,
    /// Whether the output reverses phase when an input leaves the common-mode range.
    pub reversal: bool,
    /// Input offset voltage, V (at the non-inverting input).
    pub vos: f64,
    /// Input bias current, A (into each input).
    pub ib: f64,
    /// Input voltage noise density (white part), V/sqrt(Hz).
    pub en: f64,
    /// 1/f corner of the voltage noise, Hz (0: white only).
    pub en_corner: f64,
    /// Input current noise density, A/sqrt(Hz).
    pub inoise: f64,
    /// Output short-circuit current limit, A; `None` = unlimited.
    pub isc: Option<f64>,
    /// Largest total supply (pos - neg) the part is rated for, V.
    pub supply_max: f64,
}

/// Names of the built-in profiles, in display order.
pub fn builtin_names() -> &'static [&'static str] {
    &[
        "ideal",
        "jfet-general",
        "bipolar-lownoise",
        "single-supply",
        "rail-to-rail-cmos",
    ]
}

/// A built-in profile by name.
pub fn builtin(name: &str) -> Option<OpAmp> {
    // Figures below are typical of each class, from memory (not from any one datasheet).
    let p = match name {
        "ideal" => OpAmp {
            name: name.into(),
            about: "textbook op-amp: huge bandwidth and slew, output to the rails, no limits"
                .into(),
            gbw: 1e12,
            slew: 1e12,
            a0: None,
            drop_pos: 0.0,
            drop_neg: 0.0,
            knee: 0.0,
            cm_low: None,
            cm_high: None,
            reversal: false,
            vos: 0.0,
            ib: 0.0,
            en: 0.0,
            en_corner: 0.0,
            inoise: 0.0,
            isc: None,
            supply_max: f64::INFINITY,
        },
        "jfet-general" => OpAmp {
            name: name.into(),
            about: "JFET-input general purpose; input range stops ~4 V above V-, phase reversal"
                .into(),
            gbw: 3e6,
            slew: 13e6,
            a0: Some(2e5),
            drop_pos: 1.5,
            drop_neg: 1.5,
            knee: 0.3,
            // common practice: about 4 V above the negative rail for JFET-input parts
            cm_low: Some(4.0),
            cm_high: Some(0.5),
            reversal: true,
            vos: 3e-3,
            ib: 30e-12,
            en: 18e-9,
            en_corner: 100.0,
            inoise: 0.01e-12,
            isc: Some(25e-3),
            supply_max: 36.0,
        },
        "bipolar-lownoise" => OpAmp {
            name: name.into(),
            about: "bipolar low-noise audio part: quiet, fast, higher bias current".into(),
            gbw: 10e6,
            slew: 7e6,
            a0: Some(1e6),
            drop_pos: 1.3,
            drop_neg: 1.3,
            knee: 0.3,
            cm_low: Some(2.0),
            cm_high: Some(2.0),
            reversal: false,
            vos: 0.5e-3,
            ib: 200e-9,
            en: 4.5e-9,
            en_corner: 10.0,
            inoise: 0.7e-12,
            isc: Some(35e-3),
            supply_max: 36.0,
        },
        "single-supply" => OpAmp {
            name: name.into(),
            about: "slow single-supply part: input range and output reach the negative rail".into(),
            gbw: 1e6,
            slew: 0.5e6,
            a0: Some(1e5),
            drop_pos: 1.5,
            drop_neg: 0.02,
            knee: 0.2,
            cm_low: Some(-0.3),
            cm_high: Some(1.5),
            reversal: false,
            vos: 2e-3,
            ib: 20e-9,
            en: 40e-9,
            en_corner: 200.0,
            inoise: 0.1e-12,
            isc: Some(20e-3),
            supply_max: 32.0,
        },
        "rail-to-rail-cmos" => OpAmp {
            name: name.into(),
            about: "rail-to-rail CMOS: swings to the rails, low maximum supply".into(),
            gbw: 5e6,
            slew: 3e6,
            a0: Some(3e5),
            drop_pos: 0.05,
            drop_neg: 0.05,
            knee: 0.05,
            cm_low: Some(-0.1),
            cm_high: Some(-0.1),
            reversal: false,
            vos: 1e-3,
            ib: 1e-12,
            en: 15e-9,
            en_corner: 1000.0,
            inoise: 0.001e-12,
            isc: Some(40e-3),
            supply_max: 5.5,
        },
        _ => return None,
    };
    Some(p)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_listed_profile_exists_and_is_sane() {
        for n in builtin_names() {
            let p = builtin(n).expect("listed profile exists");
            assert_eq!(&p.name, n);
            assert!(p.gbw > 0.0 && p.slew > 0.0);
            assert!(p.drop_pos >= 0.0 && p.drop_neg >= 0.0 && p.knee >= 0.0);
        }
        assert!(builtin("no-such-part").is_none());
    }
}
