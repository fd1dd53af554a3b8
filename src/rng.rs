//! The one pseudo-random generator of the crate: xoshiro256++ (Blackman and Vigna,
//! "Scrambled linear pseudorandom number generators", ACM TOMS 2021) seeded through
//! SplitMix64 (Steele, Lea and Flood, OOPSLA 2014), as those authors recommend. Deterministic
//! on every platform: the same seed gives the same stream.

/// SplitMix64 step: advance `state` and return the next output.
pub(crate) fn splitmix64(state: &mut u64) -> u64 {
    *state = state.wrapping_add(0x9e37_79b9_7f4a_7c15);
    let mut z = *state;
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// xoshiro256++.
#[derive(Debug, Clone)]
pub(crate) struct Rng {
    s: [u64; 4],
}

impl Rng {
    /// A generator whose state is four SplitMix64 outputs from `seed`.
    pub(crate) fn new(seed: u64) -> Self {
        let mut st = seed;
        Rng {
            s: [
                splitmix64(&mut st),
                splitmix64(&mut st),
                splitmix64(&mut st),
                splitmix64(&mut st),
            ],
        }
    }

    /// A generator with the given raw state (for checks against worked values).
    #[cfg(test)]
    pub(crate) fn from_state(s: [u64; 4]) -> Self {
        Rng { s }
    }

    /// The next 64 bits.
    #[inline(always)]
    pub(crate) fn next_u64(&mut self) -> u64 {
        let s = &mut self.s;
        let result = s[0].wrapping_add(s[3]).rotate_left(23).wrapping_add(s[0]);
        let t = s[1] << 17;
        s[2] ^= s[0];
        s[3] ^= s[1];
        s[1] ^= s[2];
        s[0] ^= s[3];
        s[2] ^= t;
        s[3] = s[3].rotate_left(45);
        result
    }

    /// Uniform in [0, 1).
    #[inline]
    pub(crate) fn uniform(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / 9_007_199_254_740_992.0)
    }
}

/// Four independent xoshiro256++ generators run in lockstep (one vector lane each; issue 13:
/// the serial generator's state update was the white noise's cost). Lane `i` is exactly the
/// stream of [`Rng`] seeded with [`Rng4::lane_seed`]`(seed, i)`, so each lane can be checked
/// against the plain generator; [`Rng4::next4`] returns one word of each lane.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Rng4 {
    /// `s[k][lane]`: state word `k` of each lane (structure of arrays).
    s: [[u64; 4]; 4],
}

impl Rng4 {
    /// Seed of lane `lane` of the generator seeded with `seed`.
    pub(crate) fn lane_seed(seed: u64, lane: usize) -> u64 {
        let mut st = seed ^ (lane as u64).wrapping_mul(0xd1b5_4a32_d192_ed03);
        splitmix64(&mut st)
    }

    /// Four lanes, each an [`Rng`] seeded with [`Rng4::lane_seed`].
    pub(crate) fn new(seed: u64) -> Self {
        let lanes: [Rng; 4] = std::array::from_fn(|i| Rng::new(Rng4::lane_seed(seed, i)));
        Rng4 {
            s: std::array::from_fn(|k| std::array::from_fn(|i| lanes[i].s[k])),
        }
    }

    /// The next word of each lane (the same arithmetic as [`Rng::next_u64`], lane by lane).
    #[inline(always)]
    pub(crate) fn next4(&mut self) -> [u64; 4] {
        let [s0, s1, s2, s3] = &mut self.s;
        let mut out = [0u64; 4];
        for i in 0..4 {
            out[i] = s0[i]
                .wrapping_add(s3[i])
                .rotate_left(23)
                .wrapping_add(s0[i]);
            let t = s1[i] << 17;
            s2[i] ^= s0[i];
            s3[i] ^= s1[i];
            s1[i] ^= s2[i];
            s0[i] ^= s3[i];
            s2[i] ^= t;
            s3[i] = s3[i].rotate_left(45);
        }
        out
    }

    /// The state, `[k][lane]` (for the vector version in `engine::noise`).
    #[inline(always)]
    pub(crate) fn state(&self) -> [[u64; 4]; 4] {
        self.s
    }

    /// Set the state, `[k][lane]` (for the vector version in `engine::noise`).
    #[inline(always)]
    pub(crate) fn set_state(&mut self, s: [[u64; 4]; 4]) {
        self.s = s;
    }

    /// Fill `out` (length a multiple of 4) with words, lane `i` at positions `i mod 4`.
    #[inline(always)]
    pub(crate) fn fill(&mut self, out: &mut [u64]) {
        // the state in locals (registers) for the loop
        let mut r = *self;
        for c in out.chunks_exact_mut(4) {
            c.copy_from_slice(&r.next4());
        }
        *self = r;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_lane_is_the_plain_generator() {
        // The lockstep generator against the plain one (the reference), lane by lane.
        for seed in [0u64, 1, 42, u64::MAX] {
            let mut r4 = Rng4::new(seed);
            let mut plain: Vec<Rng> = (0..4).map(|i| Rng::new(Rng4::lane_seed(seed, i))).collect();
            let mut buf = vec![0u64; 400];
            r4.fill(&mut buf);
            for (n, w) in buf.iter().enumerate() {
                assert_eq!(*w, plain[n % 4].next_u64(), "seed {seed}, word {n}");
            }
        }
        // lanes differ
        let mut r4 = Rng4::new(3);
        let w = r4.next4();
        assert!(w[0] != w[1] && w[1] != w[2] && w[2] != w[3]);
    }
}
