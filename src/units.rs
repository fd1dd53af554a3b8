//! (temporary formatting helpers; replaced by the units module)

/// Resistance in IEC 60062 code style.
pub fn fmt_resistance(r: f64) -> String {
    format!("{r}R")
}

/// Engineering notation with a unit.
pub fn fmt_eng(x: f64, unit: &str) -> String {
    format!("{x} {unit}")
}
