//! Small dense linear algebra for circuit solves: LU with partial pivoting, row-major,
//! in place, no allocation.

/// Factor the `n x n` row-major matrix `a` in place (L below the diagonal with unit
/// diagonal, U on and above), pivot rows in `perm`. Returns false when a pivot is zero or
/// not finite (a singular system).
pub fn lu_factor(a: &mut [f64], n: usize, perm: &mut [usize]) -> bool {
    for (i, p) in perm.iter_mut().enumerate().take(n) {
        *p = i;
    }
    for k in 0..n {
        let mut piv = k;
        let mut best = a[k * n + k].abs();
        for i in k + 1..n {
            let v = a[i * n + k].abs();
            if v > best {
                best = v;
                piv = i;
            }
        }
        if !(best.is_finite() && best > 0.0) {
            return false;
        }
        if piv != k {
            for j in 0..n {
                a.swap(k * n + j, piv * n + j);
            }
            perm.swap(k, piv);
        }
        let d = a[k * n + k];
        for i in k + 1..n {
            let f = a[i * n + k] / d;
            a[i * n + k] = f;
            if f != 0.0 {
                for j in k + 1..n {
                    a[i * n + j] -= f * a[k * n + j];
                }
            }
        }
    }
    true
}

/// Solve with a factor from [`lu_factor`]: `b` is overwritten by the solution (`tmp` is
/// scratch of length `n`).
pub fn lu_solve(a: &[f64], n: usize, perm: &[usize], b: &mut [f64], tmp: &mut [f64]) {
    for i in 0..n {
        tmp[i] = b[perm[i]];
    }
    for i in 0..n {
        let mut s = tmp[i];
        for j in 0..i {
            s -= a[i * n + j] * tmp[j];
        }
        tmp[i] = s;
    }
    for i in (0..n).rev() {
        let mut s = tmp[i];
        for j in i + 1..n {
            s -= a[i * n + j] * tmp[j];
        }
        tmp[i] = s / a[i * n + i];
    }
    b[..n].copy_from_slice(&tmp[..n]);
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn solves_a_system_that_needs_pivoting() {
        // [0 2 1; 1 1 1; 2 1 3] x = b with x = (1, -2, 3): b computed by hand [D].
        let mut a = vec![0.0, 2.0, 1.0, 1.0, 1.0, 1.0, 2.0, 1.0, 3.0];
        let x = [1.0, -2.0, 3.0];
        let mut b = vec![
            0.0 * x[0] + 2.0 * x[1] + x[2],
            x[0] + x[1] + x[2],
            2.0 * x[0] + x[1] + 3.0 * x[2],
        ];
        let mut perm = vec![0; 3];
        let mut tmp = vec![0.0; 3];
        assert!(lu_factor(&mut a, 3, &mut perm));
        lu_solve(&a, 3, &perm, &mut b, &mut tmp);
        for (u, v) in b.iter().zip(x) {
            assert!((u - v).abs() < 1e-12);
        }
    }

    #[test]
    fn reports_a_singular_matrix() {
        let mut a = vec![1.0, 2.0, 2.0, 4.0];
        let mut perm = vec![0; 2];
        assert!(!lu_factor(&mut a, 2, &mut perm));
    }
}
