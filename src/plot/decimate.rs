//! Per-pixel-column decimation of long series.

/// Keep, for each run of consecutive points in the same 1 px column, the first, the lowest,
/// the highest and the last point, in their original order (duplicates dropped). Points are
/// in pixels; `y` grows downwards but the rule is symmetric.
///
/// A series whose x is monotone keeps at most four points per column; a curve that goes
/// back and forth (a ramp up and down) keeps four per column crossing.
pub(crate) fn decimate(points: impl Iterator<Item = (f64, f64)>) -> Vec<(f64, f64)> {
    let mut out = Vec::new();
    let mut run: Option<Run> = None;
    for (i, (x, y)) in points.enumerate() {
        let col = x.floor() as i64;
        match run.as_mut() {
            Some(r) if r.col == col => r.push(i, x, y),
            _ => {
                if let Some(r) = run.take() {
                    r.flush(&mut out);
                }
                run = Some(Run::new(col, i, x, y));
            }
        }
    }
    if let Some(r) = run {
        r.flush(&mut out);
    }
    out
}

struct Run {
    col: i64,
    first: (usize, f64, f64),
    min: (usize, f64, f64),
    max: (usize, f64, f64),
    last: (usize, f64, f64),
}

impl Run {
    fn new(col: i64, i: usize, x: f64, y: f64) -> Self {
        let p = (i, x, y);
        Run {
            col,
            first: p,
            min: p,
            max: p,
            last: p,
        }
    }

    fn push(&mut self, i: usize, x: f64, y: f64) {
        let p = (i, x, y);
        if y < self.min.2 {
            self.min = p;
        }
        if y > self.max.2 {
            self.max = p;
        }
        self.last = p;
    }

    fn flush(self, out: &mut Vec<(f64, f64)>) {
        let mut pts = [self.first, self.min, self.max, self.last];
        pts.sort_by_key(|p| p.0);
        let mut prev = usize::MAX;
        for (i, x, y) in pts {
            if i != prev {
                out.push((x, y));
                prev = i;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keeps_extremes_and_bounds_count() {
        // 10 000 points over 100 px: at most 4 per column survive, extremes kept.
        let pts: Vec<(f64, f64)> = (0..10_000)
            .map(|i| {
                (
                    i as f64 / 100.0,
                    if i == 5_050 { -50.0 } else { (i % 7) as f64 },
                )
            })
            .collect();
        let d = decimate(pts.iter().copied());
        assert!(d.len() <= 4 * 100);
        assert!(d.contains(&(50.5, -50.0)));
        assert_eq!(d.first(), Some(&(0.0, 0.0)));
        assert_eq!(d.last(), pts.last());
    }
}
