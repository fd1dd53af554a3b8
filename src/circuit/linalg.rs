//! Small dense linear algebra for circuit solves: LU with partial pivoting, row-major,
//! in place, no allocation.

/// Factor the `n x n` row-major matrix `a` in place (L below the diagonal with unit
/// diagonal, U on and above), pivot rows in `perm`. Returns false when a pivot is zero or
/// not finite (a singular system).
pub fn lu_factor(a: &mut [f64], n: usize, perm: &mut [usize]) -> bool {
    // the small sizes a circuit group has, each its own copy with `n` a constant (loops
    // unrolled, bounds checked once); the same operations in the same order, so the same bits
    match n {
        2 => factor(a, 2, perm),
        3 => factor(a, 3, perm),
        4 => factor(a, 4, perm),
        5 => factor(a, 5, perm),
        6 => factor(a, 6, perm),
        7 => factor(a, 7, perm),
        8 => factor(a, 8, perm),
        _ => factor(a, n, perm),
    }
}

/// The loops of [`lu_factor`].
#[inline(always)]
fn factor(a: &mut [f64], n: usize, perm: &mut [usize]) -> bool {
    let a = &mut a[..n * n];
    let perm = &mut perm[..n];
    for (i, p) in perm.iter_mut().enumerate() {
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
    // sized copies as for the factor
    match n {
        2 => solve(a, 2, perm, b, tmp),
        3 => solve(a, 3, perm, b, tmp),
        4 => solve(a, 4, perm, b, tmp),
        5 => solve(a, 5, perm, b, tmp),
        6 => solve(a, 6, perm, b, tmp),
        7 => solve(a, 7, perm, b, tmp),
        8 => solve(a, 8, perm, b, tmp),
        _ => solve(a, n, perm, b, tmp),
    }
}

/// The loops of [`lu_solve`].
#[inline(always)]
fn solve(a: &[f64], n: usize, perm: &[usize], b: &mut [f64], tmp: &mut [f64]) {
    let (a, perm, b, tmp) = (&a[..n * n], &perm[..n], &mut b[..n], &mut tmp[..n]);
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
    b.copy_from_slice(tmp);
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
    fn sized_copies_give_the_same_bits_as_the_plain_one() {
        // pseudo-random systems of every sized copy's order, against the loops with the size
        // hidden from the compiler (`black_box`: the copy for any size)
        let mut seed = 12345u64;
        let mut rnd = || {
            seed = seed
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (seed >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        for n in 2..=8 {
            let a0: Vec<f64> = (0..n * n).map(|_| rnd()).collect();
            let b0: Vec<f64> = (0..n).map(|_| rnd()).collect();
            let (mut a1, mut a2) = (a0.clone(), a0.clone());
            let (mut p1, mut p2) = (vec![0; n], vec![0; n]);
            let opaque = std::hint::black_box(n);
            assert_eq!(
                lu_factor(&mut a1, n, &mut p1),
                factor(&mut a2, opaque, &mut p2)
            );
            assert_eq!(a1, a2);
            assert_eq!(p1, p2);
            let (mut b1, mut b2, mut t) = (b0.clone(), b0.clone(), vec![0.0; n]);
            lu_solve(&a1, n, &p1, &mut b1, &mut t);
            solve(&a2, opaque, &p2, &mut b2, &mut t);
            assert_eq!(b1, b2);
        }
    }

    #[test]
    fn reports_a_singular_matrix() {
        let mut a = vec![1.0, 2.0, 2.0, 4.0];
        let mut perm = vec![0; 2];
        assert!(!lu_factor(&mut a, 2, &mut perm));
    }
}
