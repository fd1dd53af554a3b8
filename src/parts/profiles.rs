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

/// The textbook op-amp (the built-in `ideal` profile): huge bandwidth and slew, output to the
/// rails, no limits. Also what a passive stage is modelled with where an op-amp is needed.
pub fn ideal() -> OpAmp {
    OpAmp {
        name: "ideal".into(),
        about: "textbook op-amp: huge bandwidth and slew, output to the rails, no limits".into(),
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
    }
}

/// A built-in profile by name.
pub fn builtin(name: &str) -> Option<OpAmp> {
    // Figures below are typical of each class, from memory (not from any one datasheet).
    let p = match name {
        "ideal" => ideal(),
        "jfet-general" => OpAmp {
            name: name.into(),
            about: "JFET-input general purpose; input range stops ~4 V above V-, phase reversal"
                .into(),
            gbw: 4.5e6,
            slew: 9e6,
            a0: Some(1.3e5),
            drop_pos: 1.8,
            drop_neg: 1.8,
            knee: 0.3,
            // common practice: about 4 V above the negative rail for JFET-input parts
            cm_low: Some(4.0),
            cm_high: Some(0.3),
            reversal: true,
            vos: 2e-3,
            ib: 60e-12,
            en: 24e-9,
            en_corner: 250.0,
            inoise: 0.015e-12,
            isc: Some(18e-3),
            supply_max: 40.0,
        },
        "bipolar-lownoise" => OpAmp {
            name: name.into(),
            about: "bipolar low-noise audio part: quiet, fast, higher bias current".into(),
            gbw: 15e6,
            slew: 10e6,
            a0: Some(4e5),
            drop_pos: 1.6,
            drop_neg: 1.6,
            knee: 0.3,
            cm_low: Some(2.2),
            cm_high: Some(2.2),
            reversal: false,
            vos: 0.3e-3,
            ib: 400e-9,
            en: 3.2e-9,
            en_corner: 6.0,
            inoise: 1.1e-12,
            isc: Some(45e-3),
            supply_max: 44.0,
        },
        "single-supply" => OpAmp {
            name: name.into(),
            about: "slow single-supply part: input range and output reach the negative rail".into(),
            gbw: 0.7e6,
            slew: 0.35e6,
            a0: Some(6e4),
            drop_pos: 1.2,
            drop_neg: 0.02,
            knee: 0.2,
            cm_low: Some(-0.3),
            cm_high: Some(1.2),
            reversal: false,
            vos: 3e-3,
            ib: 50e-9,
            en: 30e-9,
            en_corner: 300.0,
            inoise: 0.15e-12,
            isc: Some(15e-3),
            supply_max: 25.0,
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

    /// `lo <= x <= hi`, with the figure named in the failure.
    fn within(name: &str, what: &str, x: f64, lo: f64, hi: f64) {
        assert!(
            (lo..=hi).contains(&x),
            "{name}: {what} = {x:e} outside its class range {lo:e} ..= {hi:e}"
        );
    }

    // Class ranges, from memory of general-purpose op-amp families (common practice; no one
    // product): the built-in figures must stay typical of their class while the exact values
    // stay our own.
    #[test]
    fn every_builtin_profile_stays_inside_its_class() {
        let j = builtin("jfet-general").unwrap();
        within("jfet-general", "gbw", j.gbw, 2e6, 8e6);
        within("jfet-general", "slew", j.slew, 5e6, 25e6);
        within("jfet-general", "en", j.en, 10e-9, 40e-9);
        within("jfet-general", "ib", j.ib, 1e-12, 1e-9);
        // common practice: the input range stops about 4 V above V-, and the output
        // reverses phase beyond it
        within("jfet-general", "cm_low", j.cm_low.unwrap(), 3.0, 5.0);
        assert!(j.reversal);

        let b = builtin("bipolar-lownoise").unwrap();
        within("bipolar-lownoise", "gbw", b.gbw, 5e6, 50e6);
        within("bipolar-lownoise", "slew", b.slew, 3e6, 20e6);
        within("bipolar-lownoise", "en", b.en, 1e-9, 6e-9);
        within("bipolar-lownoise", "ib", b.ib, 10e-9, 2e-6);
        within("bipolar-lownoise", "in", b.inoise, 0.3e-12, 3e-12);
        assert!(!b.reversal);

        let s = builtin("single-supply").unwrap();
        within("single-supply", "gbw", s.gbw, 0.3e6, 2e6);
        within("single-supply", "slew", s.slew, 0.1e6, 1e6);
        // the class: input range includes V-, output reaches (nearly) V-
        within("single-supply", "cm_low", s.cm_low.unwrap(), -0.5, 0.0);
        within("single-supply", "drop_neg", s.drop_neg, 0.0, 0.1);

        let c = builtin("rail-to-rail-cmos").unwrap();
        within("rail-to-rail-cmos", "drop_pos", c.drop_pos, 0.0, 0.1);
        within("rail-to-rail-cmos", "drop_neg", c.drop_neg, 0.0, 0.1);
        within("rail-to-rail-cmos", "cm_low", c.cm_low.unwrap(), -0.5, 0.0);
        within(
            "rail-to-rail-cmos",
            "cm_high",
            c.cm_high.unwrap(),
            -0.5,
            0.0,
        );
        // the class: a low maximum supply
        within("rail-to-rail-cmos", "supply_max", c.supply_max, 4.0, 7.0);
        within("rail-to-rail-cmos", "ib", c.ib, 0.0, 10e-12);
    }
}
