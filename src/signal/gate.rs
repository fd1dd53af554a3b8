//! Start/stop gating, offset and the retriggered attack/decay envelope (see the module docs of
//! [`crate::signal`] for the conventions).

use super::{Generator, SignalError};
use crate::model::Source;

/// Envelope parameters in samples.
#[derive(Debug, Clone, Copy)]
struct Env {
    /// Attack time in samples (0 for an instant attack).
    attack: f64,
    /// `1 / (decay * rate)` (`inf` for an instant decay).
    inv_decay: f64,
    /// Retrigger period in samples (`None`: one shot).
    every: Option<f64>,
    /// `exp(-inv_decay)`: the decay's factor per sample.
    decay_factor: f64,
}

/// Samples between two evaluations of the decay's closed form.
const ENV_ANCHOR: u64 = 256;

/// Envelope state.
#[derive(Debug, Clone, Copy)]
struct EnvState {
    level: f64,
    /// The first trigger has happened.
    started: bool,
    attacking: bool,
    /// Level at the last trigger.
    from: f64,
    /// Samples since the last trigger (attack phase).
    since_trigger: u64,
    /// Samples since the peak (decay phase).
    since_peak: u64,
    /// Index of the next trigger (0 = the trigger at `start`).
    next_trigger: u64,
    /// Relative sample of the next trigger.
    next_at: u64,
}

const ENV_START: EnvState = EnvState {
    level: 0.0,
    started: false,
    attacking: false,
    from: 0.0,
    since_trigger: 0,
    since_peak: 0,
    next_trigger: 0,
    next_at: 0,
};

/// A waveform switched on at `start`, off at `stop`, with offset and optional envelope.
pub struct Gated {
    wave: Box<dyn Generator>,
    offset: f64,
    /// First sample that is on.
    on: u64,
    /// First sample that is off again (`u64::MAX`: never).
    off: u64,
    env: Option<Env>,
    state: EnvState,
    /// Absolute sample clock.
    n: u64,
}

fn to_samples(t: f64, rate: f64) -> u64 {
    let s = (t * rate).round();
    if s <= 0.0 {
        0
    } else if s >= u64::MAX as f64 {
        u64::MAX
    } else {
        s as u64
    }
}

impl Gated {
    /// Wrap `wave` with the gating, offset and envelope of `src`, at `rate` Hz.
    pub fn new(src: &Source, wave: Box<dyn Generator>, rate: f64) -> Result<Self, SignalError> {
        let bad = |what: String| SignalError::BadParam {
            source_name: src.name.clone(),
            what,
        };
        if !src.offset.is_finite() {
            return Err(bad(format!(
                "offset = {}: expected a finite number",
                src.offset
            )));
        }
        if !(src.start.is_finite() && src.start >= 0.0) {
            return Err(bad(format!("start = {}: expected a time >= 0", src.start)));
        }
        let off = match src.stop {
            None => u64::MAX,
            Some(s) if s.is_finite() && s >= src.start => to_samples(s, rate),
            Some(s) => {
                return Err(bad(format!(
                    "stop = {s}: expected a time >= start ({})",
                    src.start
                )))
            }
        };
        let env = match src.envelope {
            None => None,
            Some(e) => {
                if !(e.attack.is_finite() && e.attack >= 0.0) {
                    return Err(bad(format!(
                        "envelope attack = {}: expected >= 0",
                        e.attack
                    )));
                }
                if !(e.decay.is_finite() && e.decay >= 0.0) {
                    return Err(bad(format!("envelope decay = {}: expected >= 0", e.decay)));
                }
                let every = match e.every {
                    None => None,
                    Some(p) if p.is_finite() && p * rate >= 1.0 => Some(p * rate),
                    Some(p) => {
                        return Err(bad(format!(
                            "envelope every = {p}: expected at least one sample period"
                        )))
                    }
                };
                Some(Env {
                    attack: e.attack * rate,
                    inv_decay: 1.0 / (e.decay * rate),
                    every,
                    decay_factor: (-1.0 / (e.decay * rate)).exp(),
                })
            }
        };
        Ok(Gated {
            wave,
            offset: src.offset,
            on: to_samples(src.start, rate),
            off,
            env,
            state: ENV_START,
            n: 0,
        })
    }
}

impl Env {
    /// Sample index (relative to the switch-on) of trigger `k`.
    fn trigger_at(&self, k: u64) -> u64 {
        match self.every {
            None if k == 0 => 0,
            None => u64::MAX,
            Some(p) => to_samples(k as f64 * p, 1.0),
        }
    }

    /// Advance the state to relative sample `rel` (one call per sample, in order) and return
    /// the level there. The level first evolves as it would without a trigger (attack ramp or
    /// decay); a trigger on this sample then starts a linear rise from that level (0 at the
    /// first trigger), so from 0 the level reaches 1 exactly `attack * rate` samples after
    /// the trigger. An instant attack jumps to 1 on the trigger sample.
    #[inline]
    fn step(&self, st: &mut EnvState, rel: u64) -> f64 {
        if st.started {
            if st.attacking {
                st.since_trigger += 1;
                // From the trigger level, not accumulated, so no rounding builds up.
                st.level = (st.from + st.since_trigger as f64 / self.attack).min(1.0);
                if st.level >= 1.0 {
                    st.attacking = false;
                    st.since_peak = 0;
                }
            } else {
                st.since_peak += 1;
                // exp(-since_peak * inv_decay) by recurrence (one product per sample), anchored
                // to the closed form every ENV_ANCHOR samples so rounding cannot build up
                // (at most ENV_ANCHOR roundings: about 3e-14 relative). since_peak >= 1: an
                // instant decay (inv_decay = inf) gives exp(-inf) = 0 and a factor of 0.
                st.level = if st.since_peak % ENV_ANCHOR == 1 {
                    (-(st.since_peak as f64) * self.inv_decay).exp()
                } else {
                    st.level * self.decay_factor
                };
            }
        }
        if rel == st.next_at {
            st.next_trigger += 1;
            st.next_at = self.trigger_at(st.next_trigger);
            st.started = true;
            if self.attack <= 0.0 || st.level >= 1.0 {
                st.level = 1.0;
                st.attacking = false;
                st.since_peak = 0;
            } else {
                st.attacking = true;
                st.from = st.level;
                st.since_trigger = 0;
            }
        }
        st.level
    }
}

impl Generator for Gated {
    fn fill(&mut self, out: &mut [f64]) {
        let len = out.len() as u64;
        let start = self.n;
        let end = start.saturating_add(len);
        let a = self.on.clamp(start, end) - start;
        let b = self.off.clamp(start, end) - start;
        let (a, b) = (a as usize, (b as usize).max(a as usize));
        out[..a].fill(0.0);
        out[b..].fill(0.0);
        let active = &mut out[a..b];
        self.wave.fill(active);
        if let Some(env) = &self.env {
            let rel0 = (start + a as u64).saturating_sub(self.on);
            for (i, y) in active.iter_mut().enumerate() {
                let g = env.step(&mut self.state, rel0 + i as u64);
                *y = self.offset + g * *y;
            }
        } else if self.offset != 0.0 {
            for y in active.iter_mut() {
                *y += self.offset;
            }
        }
        self.n = end;
    }
    fn reset(&mut self) {
        self.wave.reset();
        self.state = ENV_START;
        self.n = 0;
    }
}
