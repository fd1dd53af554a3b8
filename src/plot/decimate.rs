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

/// Most points [`decimate_xy`] keeps; past it, the cell size doubles.
pub(crate) const MAX_XY_POINTS: usize = 16_000;

/// Decimate a curve that may go back and forth in x (a transfer curve, a Lissajous figure)
/// into sub-paths. The plot area is cut into square cells (1 px at first): consecutive
/// points in the same cell are dropped, and a step from one cell to another is drawn only
/// the first time that pair of cells is joined, so a curve that retraces itself a thousand
/// times costs no more than one pass. If more than [`MAX_XY_POINTS`] points remain, the cell
/// size doubles and the curve is decimated again. Every kept point is an input point.
pub(crate) fn decimate_xy(points: &[(f64, f64)]) -> Vec<Vec<(f64, f64)>> {
    let mut cell = 1.0;
    loop {
        let out = decimate_xy_cells(points, cell);
        let n: usize = out.iter().map(Vec::len).sum();
        if n <= MAX_XY_POINTS || cell > 1e6 {
            return out;
        }
        cell *= 2.0;
    }
}

fn decimate_xy_cells(points: &[(f64, f64)], size: f64) -> Vec<Vec<(f64, f64)>> {
    let cell_of = |(x, y): (f64, f64)| ((x / size).floor() as i64, (y / size).floor() as i64);
    let mut out: Vec<Vec<(f64, f64)>> = Vec::new();
    let mut joined = std::collections::HashSet::new();
    let Some(&first) = points.first() else {
        return out;
    };
    let mut last = first;
    let mut last_cell = cell_of(first);
    let mut current: Vec<(f64, f64)> = vec![first];
    for &p in &points[1..] {
        let c = cell_of(p);
        if c == last_cell {
            continue;
        }
        let pair = if last_cell < c {
            (last_cell, c)
        } else {
            (c, last_cell)
        };
        if joined.insert(pair) {
            if current.is_empty() {
                current.push(last);
            }
            current.push(p);
        } else if !current.is_empty() {
            out.push(std::mem::take(&mut current));
        }
        last = p;
        last_cell = c;
    }
    if current.len() > 1 || (out.is_empty() && !current.is_empty()) {
        out.push(current);
    }
    out
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

    #[test]
    fn retraced_curve_costs_one_pass() {
        // 200 round trips along the same diagonal: the second and later passes add nothing.
        let one: Vec<(f64, f64)> = (0..=400).map(|i| (i as f64, 0.5 * i as f64)).collect();
        let mut many = Vec::new();
        for k in 0..200 {
            if k % 2 == 0 {
                many.extend(one.iter().copied());
            } else {
                many.extend(one.iter().rev().copied());
            }
        }
        let d = decimate_xy(&many);
        let n: usize = d.iter().map(Vec::len).sum();
        assert!(n <= 402, "{n}");
        assert_eq!(d[0][0], (0.0, 0.0));
        assert_eq!(*d[0].last().unwrap(), (400.0, 200.0));
    }
}
