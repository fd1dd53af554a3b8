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
