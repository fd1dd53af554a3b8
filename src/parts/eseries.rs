//! Preferred values of resistors (IEC 60063 E-series) and the nearest-value search.
//!
//! E12 and E24 are tabulated (they are *not* `round(10^(i/24))`: IEC 60063 keeps the older
//! values 2.7 ... 4.7 and 8.2). E48, E96 and E192 follow `round(10^(i/N))` to three
//! significant figures, with the one published exception 9.20 (not 9.19) in E192.

/// An E-series.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Series {
    /// 10 % series, 12 values per decade.
    E12,
    /// 5 % series, 24 values per decade.
    E24,
    /// 2 % series, 48 values per decade.
    E48,
    /// 1 % series, 96 values per decade.
    E96,
    /// 0.5 % series, 192 values per decade.
    E192,
}

/// IEC 60063 E12 mantissas.
pub const E12: [f64; 12] = [1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2];

/// IEC 60063 E24 mantissas.
pub const E24: [f64; 24] = [
    1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 5.6,
    6.2, 6.8, 7.5, 8.2, 9.1,
];

impl Series {
    /// Parse "E12", "e24", ...
    pub fn parse(s: &str) -> Option<Series> {
        match s.trim().to_ascii_uppercase().as_str() {
            "E12" => Some(Series::E12),
            "E24" => Some(Series::E24),
            "E48" => Some(Series::E48),
            "E96" => Some(Series::E96),
            "E192" => Some(Series::E192),
            _ => None,
        }
    }

    /// Display name.
    pub fn name(self) -> &'static str {
        match self {
            Series::E12 => "E12",
            Series::E24 => "E24",
            Series::E48 => "E48",
            Series::E96 => "E96",
            Series::E192 => "E192",
        }
    }

    /// Mantissas in [1, 10), ascending.
    pub fn mantissas(self) -> Vec<f64> {
        match self {
            Series::E12 => E12.to_vec(),
            Series::E24 => E24.to_vec(),
            Series::E48 => computed(48),
            Series::E96 => computed(96),
            Series::E192 => computed(192),
        }
    }

    /// Every value of the series in `[lo, hi]` (ohms, or any unit), ascending.
    pub fn values_in(self, lo: f64, hi: f64) -> Vec<f64> {
        let mut out = Vec::new();
        if !(lo > 0.0 && hi >= lo && hi.is_finite()) {
            return out;
        }
        let m = self.mantissas();
        let mut decade = lo.log10().floor() as i32;
        loop {
            let scale = 10f64.powi(decade);
            if scale > hi * 1.000001 {
                break;
            }
            for &v in &m {
                let x = round_sig(v * scale, 3);
                if x >= lo * 0.999999 && x <= hi * 1.000001 {
                    out.push(x);
                }
            }
            decade += 1;
        }
        out
    }

    /// The value of this series nearest to `x` (in ratio, i.e. on a log scale).
    pub fn nearest(self, x: f64) -> f64 {
        if !(x > 0.0 && x.is_finite()) {
            return x;
        }
        let decade = x.log10().floor() as i32;
        let mut best = x;
        let mut best_err = f64::INFINITY;
        for d in [decade - 1, decade, decade + 1] {
            let scale = 10f64.powi(d);
            for &v in &self.mantissas() {
                let c = round_sig(v * scale, 3);
                let err = (c / x).ln().abs();
                if err < best_err {
                    best_err = err;
                    best = c;
                }
            }
        }
        best
    }

    /// Whether `x` is a value of this series (within 0.05 %).
    pub fn contains(self, x: f64) -> bool {
        let n = self.nearest(x);
        ((n - x) / x).abs() < 5e-4
    }
}

fn computed(n: u32) -> Vec<f64> {
    (0..n)
        .map(|i| {
            let v = (100.0 * 10f64.powf(i as f64 / n as f64)).round() / 100.0;
            // IEC 60063 lists 9.20 where the formula gives 9.19 (E192 only).
            if n == 192 && (v - 9.19).abs() < 1e-9 {
                9.20
            } else {
                v
            }
        })
        .collect()
}

fn round_sig(x: f64, digits: i32) -> f64 {
    if x == 0.0 {
        return 0.0;
    }
    let p = digits - 1 - x.abs().log10().floor() as i32;
    let f = 10f64.powi(p);
    (x * f).round() / f
}

#[cfg(test)]
mod tests {
    use super::*;

    // IEC 60063: E96 mantissas 1.00, 1.02, 1.05 ... 9.76 [S]; derived as round(100*10^(i/96)) [D].
    #[test]
    fn e96_starts_and_ends_as_published() {
        let m = Series::E96.mantissas();
        assert_eq!(m.len(), 96);
        assert_eq!(&m[..4], &[1.00, 1.02, 1.05, 1.07]);
        assert_eq!(m[95], 9.76);
    }

    // IEC 60063 E24 table [S]: 25 values from 10k to 100k inclusive.
    #[test]
    fn e24_between_10k_and_100k() {
        let v = Series::E24.values_in(10e3, 100e3);
        let k: Vec<f64> = v.iter().map(|x| x / 1e3).collect();
        assert_eq!(
            k,
            vec![
                10.0, 11.0, 12.0, 13.0, 15.0, 16.0, 18.0, 20.0, 22.0, 24.0, 27.0, 30.0, 33.0, 36.0,
                39.0, 43.0, 47.0, 51.0, 56.0, 62.0, 68.0, 75.0, 82.0, 91.0, 100.0
            ]
        );
    }

    #[test]
    fn nearest_values() {
        assert_eq!(Series::E24.nearest(45e3), 47e3);
        assert_eq!(Series::E24.nearest(9.5e3), 9.1e3);
        assert!(Series::E24.contains(4.7e3));
        assert!(!Series::E24.contains(4.6e3));
        assert_eq!(Series::E12.nearest(1.05e5), 1.0e5);
    }
}
