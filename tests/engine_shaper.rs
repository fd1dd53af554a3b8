//! The band-limited clamp's closed forms (issue 13: a cheaper evaluation past the knees)
//! against its plain reference (every piece by Gauss-Legendre quadrature) and against an
//! independent brute-force quadrature of the definition: the polynomial through the seven
//! samples by Lagrange's formula [S: Lagrange interpolation], the residual of the static
//! clamp weighted by the triangle kernel (1 - |t|) over |t| <= 1, midpoint rule.

use railsong::engine::shaper::{Shaper, GIBBS, WINDOW};

fn lagrange(x: &[f64; WINDOW], t: f64) -> f64 {
    let mut acc = 0.0;
    for (i, &xi) in x.iter().enumerate() {
        let ti = i as f64 - 3.0;
        let mut l = 1.0;
        for j in 0..WINDOW {
            if j != i {
                let tj = j as f64 - 3.0;
                l *= (t - tj) / (ti - tj);
            }
        }
        acc += l * xi;
    }
    acc
}

fn direct(s: &Shaper, x: &[f64; WINDOW]) -> f64 {
    let n = 200_000;
    let mut acc = 0.0;
    for i in 0..n {
        let t = -1.0 + (i as f64 + 0.5) * 2.0 / n as f64;
        acc += (1.0 - t.abs()) * (s.apply(lagrange(x, t)) - lagrange(x, t)) * 2.0 / n as f64;
    }
    let g = GIBBS * (s.hi - s.lo);
    (x[3] + acc).clamp(s.lo - g, s.hi + g)
}

/// Windows of tones (several amplitudes, frequencies, offsets and sub-sample phases, so the
/// drive grazes, crosses and stays past the rails), with a little xorshift jitter.
fn windows() -> Vec<[f64; WINDOW]> {
    let mut v = Vec::new();
    let mut r = 0x9e37_79b9_7f4a_7c15u64;
    let mut jitter = || {
        r ^= r << 13;
        r ^= r >> 7;
        r ^= r << 17;
        (r >> 11) as f64 / (1u64 << 53) as f64 - 0.5
    };
    for w in [0.01, 0.1, 0.4, 0.9] {
        for a in [9.0, 9.95, 10.2, 11.0, 14.0, 25.0] {
            for dc in [-3.0, 0.0, 2.5] {
                for k in 0..24 {
                    let t0 = k as f64 / 24.0 * std::f64::consts::TAU / w;
                    let j = 0.05 * jitter();
                    v.push(std::array::from_fn(|i| {
                        a * (w * (i as f64 - 3.0) - w * t0).cos() + dc + j * i as f64
                    }));
                }
            }
        }
    }
    v.push([0.0, 0.0, 0.0, 5.0, 14.0, 14.0, 14.0]);
    v.push([-12.0, -12.0, -12.0, 0.0, 12.0, 12.0, 12.0]);
    v.push([11.0, 10.6, 10.5, 9.7, 10.6, 10.4, 11.0]);
    v.push([30.0; WINDOW]);
    v.push([-30.0; WINDOW]);
    v
}

#[test]
fn closed_forms_equal_the_quadrature_reference() {
    let mut past = 0;
    for sw in [0.0, 0.3, 1.0] {
        let s = Shaper {
            lo: -10.0,
            hi: 10.0,
            w: sw,
        };
        for x in windows() {
            let got = s.smooth7(&x);
            let want = s.smooth7_reference(&x);
            assert!((got - want).abs() < 1e-12, "w {sw} {x:?}: {got} vs {want}");
            past += usize::from(x.iter().all(|v| v.abs() > 10.0 + sw));
        }
    }
    // the set holds windows wholly past a knee (the closed form's common case)
    assert!(past > 50, "{past}");
}

#[test]
fn closed_forms_equal_a_brute_force_quadrature() {
    for sw in [0.0, 0.3] {
        let s = Shaper {
            lo: -10.0,
            hi: 10.0,
            w: sw,
        };
        for x in windows().iter().step_by(11) {
            let got = s.smooth7(x);
            let want = direct(&s, x);
            assert!((got - want).abs() < 1e-6, "w {sw} {x:?}: {got} vs {want}");
        }
    }
}
