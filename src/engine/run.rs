//! The running engine: block processing of a [`Plan`].

use super::edges::{corner_weights, SlewStep, Stepped, Swing};
use super::feed::{SourceFeed, ToneFeed};
use super::halfband::Decimator;
use super::network::{net_block, NetRun};
use super::noise::NoiseStream;
use super::plan::{Plan, StagePlan, StageStep, FAST_VD};
use super::shaper::{reach7, Shaper, LOOKAHEAD, WINDOW};
use super::{EngineError, StageEvents};

/// Per-stage running state.
#[derive(Debug, Clone)]
struct StageState {
    v: f64,
    p_prev: f64,
    p_prev2: f64,
    /// `p` three and four samples back (the stiff slew model's target, [`SlewStep`]).
    p_prev3: f64,
    p_prev4: f64,
    /// Slewing up (`1`), down (`-1`) or not (`0`) at the end of the last step (the stiff
    /// slew model's mode, [`SlewStep`]).
    mode: i8,
    /// Slope-corner corrections still to add to the next two drive samples.
    pend: [f64; 2],
    /// Reversal edges (issue 16).
    rv: RevState,
    vc: Vec<f64>,
    vf: f64,
    /// The last `WINDOW - 1` drive samples, oldest first (the clamp's window less its
    /// newest sample).
    xh: [f64; WINDOW - 1],
    clip: u64,
    slew: u64,
    cm: u64,
    rev: u64,
    /// Highest and lowest shaped output so far (the circuit's own peaks, internal rate).
    out_max: f64,
    out_min: f64,
    /// Internal sample index (from the first pre-roll sample) of the first clipped sample.
    first_clip: Option<u64>,
}

impl StageState {
    fn rest(sp: &StagePlan) -> StageState {
        StageState {
            v: sp.rest_v,
            p_prev: sp.rest_p,
            p_prev2: sp.rest_p,
            p_prev3: sp.rest_p,
            p_prev4: sp.rest_p,
            mode: 0,
            pend: [0.0; 2],
            rv: RevState::REST,
            vc: sp.rest_vc.clone(),
            vf: sp.rest_vf,
            xh: [sp.rest_v; WINDOW - 1],
            clip: 0,
            slew: 0,
            cm: 0,
            rev: 0,
            out_max: f64::NEG_INFINITY,
            out_min: f64::INFINITY,
            first_clip: None,
        }
    }

    fn restore_from(&mut self, o: &StageState) {
        self.v = o.v;
        self.p_prev = o.p_prev;
        self.p_prev2 = o.p_prev2;
        self.p_prev3 = o.p_prev3;
        self.p_prev4 = o.p_prev4;
        self.mode = o.mode;
        self.pend = o.pend;
        self.rv = o.rv;
        self.vc.copy_from_slice(&o.vc);
        self.vf = o.vf;
        self.xh = o.xh;
        self.clip = o.clip;
        self.slew = o.slew;
        self.cm = o.cm;
        self.rev = o.rev;
        self.out_max = o.out_max;
        self.out_min = o.out_min;
        self.first_clip = o.first_clip;
    }
}

/// A reversing stage's edges (issue 16): whether the loop was reversed at the last step, V+
/// at the last two samples (for the instant the input leaves or re-enters its range), and
/// the output overrides around an edge. The drive that the clamp reads stays the plain
/// trajectory (held at the rail while reversed), whose window around a rail-to-rail jump
/// no local polynomial fits; the samples whose clamp window holds an edge take instead the
/// static clamp of their drive plus the edge's band-limited corrections (`ov`, NaN where
/// none; `oh` the overrides of the drive history `xh`, aligned with it).
#[derive(Debug, Clone, Copy)]
struct RevState {
    on: bool,
    /// The last step returned from a reversal and still ramped ([`Stepped::ret`]).
    ret: bool,
    vp1: f64,
    vp2: f64,
    oh: [f64; WINDOW - 1],
    /// Samples still to override after the current one, and the corrections of the next two.
    ofut: u8,
    ocar: [f64; 2],
    /// Whether this block's override buffer holds anything (it is filled with NaN first).
    blk: bool,
}

impl RevState {
    const REST: RevState = RevState {
        on: false,
        ret: false,
        vp1: f64::NAN,
        vp2: f64::NAN,
        oh: [f64::NAN; WINDOW - 1],
        ofut: 0,
        ocar: [0.0; 2],
        blk: false,
    };

    /// Overrides (or adds to the override of) the sample `back` samples before `t`: its
    /// output becomes the static clamp of its drive plus `add`.
    #[inline]
    #[allow(clippy::too_many_arguments)]
    fn mark(
        &mut self,
        ov: &mut [f64],
        x: &[f64],
        xh: &[f64; WINDOW - 1],
        sh: &Shaper,
        t: usize,
        back: usize,
        add: f64,
    ) {
        const H: usize = WINDOW - 1;
        if !self.blk {
            ov.fill(f64::NAN);
            self.blk = true;
        }
        let slot = if t >= back {
            let i = t - back;
            if ov[i].is_nan() {
                ov[i] = sh.apply(x[i]);
            }
            &mut ov[i]
        } else {
            let i = H + t - back;
            if self.oh[i].is_nan() {
                self.oh[i] = sh.apply(xh[i]);
            }
            &mut self.oh[i]
        };
        *slot += add;
    }

    /// After sample `t`'s drive is final: the override it was promised by an earlier edge,
    /// then this step's edge (`r`, its corners' corrections on `t - 2 ..= t + 1`, the
    /// overrides on `t - 3 ..= t + 2`: every sample whose clamp window holds the edge).
    #[inline]
    #[allow(clippy::too_many_arguments)]
    fn after(
        &mut self,
        ov: &mut [f64],
        x: &[f64],
        xh: &[f64; WINDOW - 1],
        sh: &Shaper,
        t: usize,
        r: Option<&Stepped>,
        aa: bool,
    ) {
        if self.ofut > 0 {
            let c = self.ocar[0];
            self.mark(ov, x, xh, sh, t, 0, c);
            self.ocar = [self.ocar[1], 0.0];
            self.ofut -= 1;
        }
        let Some(r) = r else { return };
        if !aa || r.n == 0 {
            return;
        }
        let w = corner_weights(r);
        for back in 0..=3 {
            self.mark(ov, x, xh, sh, t, back, w[3 - back]);
        }
        self.ocar[0] += w[4];
        self.ocar[1] += w[5];
        self.ofut = 2;
    }
}

/// Runs a compiled [`Plan`] block by block.
pub struct Engine {
    plan: Plan,
    feeds: Vec<Box<dyn SourceFeed>>,
    bufs: Vec<Vec<f64>>,
    states: Vec<StageState>,
    saved: Vec<StageState>,
    xbuf: Vec<f64>,
    /// Output overrides of a reversing stage's block ([`RevState`]).
    ovbuf: Vec<f64>,
    pbuf: Vec<f64>,
    qbuf: Vec<f64>,
    decims: Vec<Decimator>,
    out_base: Vec<Vec<f64>>,
    /// Noise streams of the stages (`None`: noise off or silent stage) and their block
    /// buffers.
    stage_noise: Vec<Option<NoiseStream>>,
    nbuf: Vec<Vec<f64>>,
    /// Noise streams of the outputs and one scratch block for the noisy output.
    out_noise: Vec<Option<NoiseStream>>,
    obuf: Vec<f64>,
    pos: usize,
    avail: usize,
    skip: usize,
    fast: bool,
    /// Whether network groups run on their small-group kernels (else the generic path).
    group_kernels: bool,
    fast_blocks: u64,
    full_blocks: u64,
    /// Per stage: the weakly nonlinear step's polynomials ([`WeakStep`]), when they apply.
    weak: Vec<Option<WeakStep>>,
    /// Running state of every network stage.
    nets: Vec<NetRun>,
    /// Internal samples processed since the start (for the time of a failed step).
    steps: u64,
    /// The first failure of a network step.
    failure: Option<EngineError>,
    /// Internal blocks computed since the last reset.
    blocks: u64,
}

impl std::fmt::Debug for Engine {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Engine")
            .field("plan", &self.plan)
            .field("fast", &self.fast)
            .finish_non_exhaustive()
    }
}

/// `ln(sinh(z))` for `z > 0`, without overflow.
#[inline]
fn ln_sinh(z: f64) -> f64 {
    if z > 1.0 {
        z - std::f64::consts::LN_2 + (-(-2.0 * z).exp()).ln_1p()
    } else {
        z.sinh().ln()
    }
}

/// One step of `dv/dt = SR tanh(f Vd / Vov) - k eps v` with `Vd = p - b v`, the input as a
/// first-order hold from `pp` to `p`. Returns the new (unclamped) output.
///
/// For a constant target the slew equation is separable: with `z = f Vd / Vov`,
/// `dz/dt = -k f b tanh z`, so `sinh z(h) = sinh z(0) exp(-k f b h)` exactly. That exact
/// decay, taken for the step's mean target, defines an effective `phi = ln(z0 / z1) / lam`;
/// the step is then the exact exponential (first-order-hold) step of the linear equation with
/// that `phi`. Small signals give `phi = 1`, the linear recursion; a slewing step moves by
/// exactly `SR h`.
#[allow(clippy::too_many_arguments)]
#[inline]
fn solve(v0: f64, p: f64, pp: f64, b: f64, eps: f64, f: f64, kh: f64, vov: f64) -> f64 {
    let z0 = (f * (0.5 * (p + pp) - b * v0) / vov).abs();
    let lam = kh * f * b;
    let phi_eff = phi_ref(z0, lam);
    let g = f * phi_eff;
    let c = g * b + eps;
    let (e, a1, a0) = super::plan::foh(kh * c);
    let inv = g / c;
    let v = e * v0 + (a1 * p + a0 * pp) * inv;
    // |dv/dt| <= SR + k eps |v| holds for the exact trajectory; the first-order hold can
    // overshoot it when the target moves by several Vov within one step.
    let dmax = kh * (vov + eps * v0.abs());
    v0 + (v - v0).clamp(-dmax, dmax)
}

/// The effective `phi` of [`solve`] for `z0 = |f Vd| / Vov` (mean target) and
/// `lam = k f b h`, with the library's special functions.
#[inline]
fn phi_ref(z0: f64, lam: f64) -> f64 {
    if z0 < 1e-4 || lam <= 0.0 {
        1.0
    } else {
        let ls0 = ln_sinh(z0);
        let l1 = ls0 - lam;
        let ln_z1 = if l1 < -20.0 {
            l1
        } else if l1 > 20.0 {
            (l1 + std::f64::consts::LN_2).ln()
        } else {
            l1.exp().asinh().ln()
        };
        ((z0.ln() - ln_z1) / lam).clamp(0.0, 1.0)
    }
}

/// Degree of the weak-step polynomials.
const WEAK_DEG: usize = 8;
/// `z0` below which the weak-step polynomials apply (`w = z0^2 < WEAK_W`).
const WEAK_W: f64 = 0.25;

/// The full step of a stage for weakly nonlinear samples (issue 13): for `f = 1` the step is
/// `v = E(w) v0 + A1(w) p + A0(w) pp` with `w = z0^2` (phi depends on `z0` only through
/// `w`: `ln(sinh z / z)` and `asinh` are odd/even analytic), and `E`, `A1`, `A0` are analytic
/// on `0 <= w < 1/4` with their nearest singularity at `w = -pi^2` or beyond `w = 6 lam`.
/// They are interpolated once per stage at the Chebyshev points of `[0, 1/4]` (values from
/// the reference step's own formulas) with degree [`WEAK_DEG`] (interpolation error about
/// `rho^-9`, `rho` > 90: below 1e-16 relative; Trefethen, "Approximation Theory and
/// Approximation Practice", 2013, ch. 8) and evaluated as polynomials in `w` (Estrin).
/// Only for `lam = k b h >= 1` (a pole of `A1`, `A0` sits near `w = 6 lam`).
#[derive(Debug, Clone)]
struct WeakStep {
    e: [f64; WEAK_DEG + 1],
    a1: [f64; WEAK_DEG + 1],
    a0: [f64; WEAK_DEG + 1],
    inv_vov: f64,
}

impl WeakStep {
    fn new(sp: &StagePlan, h: f64) -> Option<WeakStep> {
        WeakStep::with(sp.gbw, sp.b, sp.eps, sp.vov, h)
    }

    /// From the part's GBW, the feedback fraction `b`, `eps = 1 / A0`, `Vov` and the step.
    fn with(gbw: f64, b: f64, eps: f64, vov: f64, h: f64) -> Option<WeakStep> {
        let kh = std::f64::consts::TAU * gbw * h;
        let lam = kh * b;
        if !(lam >= 1.0 && lam.is_finite() && vov > 0.0 && vov.is_finite()) {
            return None;
        }
        let n = WEAK_DEG + 1;
        let mut vals = [[0.0; WEAK_DEG + 1]; 3];
        let mut ts = [0.0; WEAK_DEG + 1];
        for k in 0..n {
            let t = (std::f64::consts::PI * (2 * k + 1) as f64 / (2 * n) as f64).cos();
            ts[k] = t;
            let w = (t + 1.0) * WEAK_W / 2.0;
            let phi = phi_ref(w.sqrt(), lam);
            let c = phi * b + eps;
            let (e, a1, a0) = super::plan::foh(kh * c);
            let inv = phi / c;
            vals[0][k] = e;
            vals[1][k] = a1 * inv;
            vals[2][k] = a0 * inv;
        }
        // Chebyshev coefficients, then monomial coefficients in t.
        let mono = |v: &[f64; WEAK_DEG + 1]| {
            let mut cheb = [0.0; WEAK_DEG + 1];
            for (j, cj) in cheb.iter_mut().enumerate() {
                let mut acc = 0.0;
                for k in 0..n {
                    acc += v[k] * (j as f64 * ts[k].acos()).cos();
                }
                *cj = acc * 2.0 / n as f64;
            }
            cheb[0] *= 0.5;
            // T_0 = 1, T_1 = t, T_{j+1} = 2 t T_j - T_{j-1}, as monomial coefficient rows
            let mut out = [0.0; WEAK_DEG + 1];
            let mut tm1 = [0.0; WEAK_DEG + 1];
            let mut tj = [0.0; WEAK_DEG + 1];
            tm1[0] = 1.0;
            tj[1] = 1.0;
            out[0] += cheb[0];
            for (o, x) in out.iter_mut().zip(&tj) {
                *o += cheb[1] * x;
            }
            for cj in cheb.iter().skip(2) {
                let mut next = [0.0; WEAK_DEG + 1];
                for i in 0..=WEAK_DEG {
                    next[i] = -tm1[i] + if i > 0 { 2.0 * tj[i - 1] } else { 0.0 };
                }
                for (o, x) in out.iter_mut().zip(&next) {
                    *o += cj * x;
                }
                tm1 = tj;
                tj = next;
            }
            out
        };
        // p(t) with t = 8 w - 1, as monomial coefficients in w (Horner on coefficient rows)
        let in_w = |c: [f64; WEAK_DEG + 1]| {
            let mut r = [0.0; WEAK_DEG + 1];
            for &ck in c.iter().rev() {
                let mut next = [0.0; WEAK_DEG + 1];
                for i in 0..=WEAK_DEG {
                    next[i] = -r[i] + if i > 0 { 8.0 * r[i - 1] } else { 0.0 };
                }
                next[0] += ck;
                r = next;
            }
            r
        };
        Some(WeakStep {
            e: in_w(mono(&vals[0])),
            a1: in_w(mono(&vals[1])),
            a0: in_w(mono(&vals[2])),
            inv_vov: 1.0 / vov,
        })
    }
}

/// A polynomial of degree 8 by Estrin's scheme (short dependency chains).
#[inline(always)]
fn poly8(c: &[f64; WEAK_DEG + 1], t: f64, t2: f64, t4: f64) -> f64 {
    let p01 = c[0] + c[1] * t;
    let p23 = c[2] + c[3] * t;
    let p45 = c[4] + c[5] * t;
    let p67 = c[6] + c[7] * t;
    let q0 = p01 + p23 * t2;
    let q1 = p45 + p67 * t2;
    q0 + q1 * t4 + c[8] * (t4 * t4)
}

/// Per-stage constants of [`solve_fast`], computed once per block.
#[derive(Debug, Clone, Copy)]
struct StepConsts {
    kh: f64,
    /// `lam = kh b` (the slew decay exponent at `f = 1`), its inverse and `E = exp(-lam)`.
    lam: f64,
    inv_lam: f64,
    e_lam: f64,
    /// `exp(-kh (b + eps))`: the step's memory at `phi = 1`.
    e_lin: f64,
    /// `E sinh(1/2)` is below 1e-8, so the weakly nonlinear branch applies for `z0 < 1/2`.
    weak: bool,
}

impl StepConsts {
    fn new(sp: &StagePlan, kh: f64) -> StepConsts {
        let lam = kh * sp.b;
        let e_lam = (-lam).exp();
        StepConsts {
            kh,
            lam,
            inv_lam: 1.0 / lam,
            e_lam,
            e_lin: (-kh * (sp.b + sp.eps)).exp(),
            weak: lam > 0.0 && e_lam * 0.53 < 1e-8,
        }
    }
}

/// `ln(sinh z / z)` for `|z| <= 1/2`: its Maclaurin series
/// `sum 2^(2n) B_2n z^(2n) / (2n (2n)!)` (B the Bernoulli numbers; any table of series,
/// e.g. Abramowitz and Stegun 4.5.64 with 4.3.71), ten terms (the next is below 1e-17).
#[inline(always)]
fn ln_sinhc_small(z: f64) -> f64 {
    let w = z * z;
    let mut p = -1.140_257_560_229_609_1e-11;
    p = p * w + 1.250_435_917_600_499_7e-10;
    p = p * w - 1.388_413_049_373_729_9e-9;
    p = p * w + 1.566_139_132_276_698_3e-8;
    p = p * w - 1.803_670_234_005_331e-7;
    p = p * w + 2.137_779_915_557_693_5e-6;
    p = p * w - 2.645_502_645_502_645_6e-5;
    p = p * w + 3.527_336_860_670_194e-4;
    p = p * w - 5.555_555_555_555_556e-3;
    p = p * w + 1.0 / 6.0;
    p * w
}

/// [`solve`] with the engine's own special functions ([`super::fastmath`]; issue 13: cheaper
/// special functions on the full step). The same closed form, `z1 = asinh(sinh(z0) E)`,
/// `E = exp(-lam)`, `phi = ln(z0 / z1) / lam`, then the first-order-hold step, evaluated in
/// one of two ways:
/// - weakly nonlinear (`f = 1`, `z0 < 1/2`, `E sinh z0 < 1e-8`, the usual case of a stage
///   whose error voltage is just past the fast path's bound): `asinh` is the identity there
///   (to 1e-17), so `phi = 1 - ln(sinh z0 / z0) / lam`, a short series, and the step's memory
///   `exp(-kh (phi b + eps)) = exp(-kh (b + eps)) exp(lam (1 - phi))` needs only a
///   polynomial for the second factor (its argument is `ln(sinh z0 / z0) < 0.042`);
/// - otherwise with [`super::fastmath`]'s `exp`, `ln`, `sinh` and `asinh`.
///
/// `(1 - e^-x) / x` uses its Taylor series below `x = 0.5`. Falls back to [`solve`] where
/// `sinh(z0) E` leaves the normal range. Agrees with [`solve`] to about 1e-15 relative (the
/// engine's fast/full test holds it to 1 uV).
#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn solve_fast(v0: f64, p: f64, pp: f64, b: f64, eps: f64, f: f64, vov: f64, k: &StepConsts) -> f64 {
    use super::fastmath::{asinh, exp, ln, sinh};
    let kh = k.kh;
    let z0 = (f * (0.5 * (p + pp) - b * v0) / vov).abs();
    let (phi_eff, e) = if z0 < 1e-4 || k.lam <= 0.0 {
        (
            1.0,
            if f == 1.0 {
                k.e_lin
            } else {
                exp(-kh * (f * b + eps))
            },
        )
    } else if f == 1.0 && k.weak && z0 < 0.5 {
        let l = ln_sinhc_small(z0);
        let phi = (1.0 - l * k.inv_lam).clamp(0.0, 1.0);
        // exp(l), l < 0.042: Taylor to l^7 (next term below 1e-14 relative of l^8 / 8!)
        let mut x = 1.0 / 5040.0;
        for d in [720.0, 120.0, 24.0, 6.0, 2.0, 1.0, 1.0] {
            x = x * l + 1.0 / d;
        }
        (phi, k.e_lin * x)
    } else {
        let lam = kh * f * b;
        let el = if f == 1.0 { k.e_lam } else { exp(-lam) };
        let y = if z0 < 700.0 { sinh(z0) * el } else { 0.0 };
        if !(1e-300..=1e300).contains(&y) {
            return solve(v0, p, pp, b, eps, f, kh, vov);
        }
        let phi = (ln(z0 / asinh(y)) / lam).clamp(0.0, 1.0);
        (phi, exp(-kh * (f * phi * b + eps)))
    };
    let g = f * phi_eff;
    let c = g * b + eps;
    let ic = 1.0 / c;
    let lam1 = kh * c;
    // r = (1 - e^-x) / x; below x = 0.5 by its Taylor series sum (-x)^n / (n + 1)! (to n = 16,
    // next term below 1e-22), above it directly (1 - e has no cancellation there).
    let r = if lam1 < 0.5 {
        let mut t = 1.0 / 355_687_428_096_000.0;
        for d in [
            20_922_789_888_000.0,
            1_307_674_368_000.0,
            87_178_291_200.0,
            6_227_020_800.0,
            479_001_600.0,
            39_916_800.0,
            3_628_800.0,
            362_880.0,
            40_320.0,
            5_040.0,
            720.0,
            120.0,
            24.0,
            6.0,
            2.0,
            1.0,
        ] {
            t = 1.0 / d - lam1 * t;
        }
        t
    } else {
        (1.0 - e) * ic / kh
    };
    let (a1, a0) = (1.0 - r, r - e);
    let v = e * v0 + (a1 * p + a0 * pp) * (g * ic);
    let dmax = kh * (vov + eps * v0.abs());
    v0 + (v - v0).clamp(-dmax, dmax)
}

impl Engine {
    /// An engine with the built-in generators for every source.
    pub fn new(plan: &Plan) -> Engine {
        Engine::with_feeds(plan, Vec::new())
    }

    /// An engine whose first `feeds.len()` sources come from the given feeds (in source
    /// order); the remaining sources use the built-in generators. Extra feeds are ignored.
    pub fn with_feeds(plan: &Plan, feeds: Vec<Box<dyn SourceFeed>>) -> Engine {
        let plan = plan.clone();
        let mut given = feeds.into_iter();
        let mut all: Vec<Box<dyn SourceFeed>> = Vec::new();
        for s in &plan.sources {
            match given.next() {
                Some(f) => all.push(f),
                None => all.push(Box::new(ToneFeed::new(s, plan.internal_rate, plan.preroll))),
            }
        }
        let nb = plan.buffers;
        let b = plan.block;
        let hist = plan.history;
        let bufs = vec![vec![0.0; hist + b]; nb];
        let states: Vec<StageState> = plan.stages.iter().map(StageState::rest).collect();
        let saved = states.clone();
        let decims = plan
            .outputs
            .iter()
            .map(|_| Decimator::new(plan.oversample, b))
            .collect();
        let out_base = vec![vec![0.0; b / plan.oversample]; plan.outputs.len()];
        let fs = plan.internal_rate;
        // Issue 13: the 1/f part of each stage runs at a lower rate, at least
        // FLICKER_MIN_RATE (held; see noise.rs), and the outputs' thermal noise is added
        // after decimation at the base rate.
        let kf = plan.oversample;
        let hold = ((fs / super::noise::FLICKER_MIN_RATE).floor() as usize).max(1);
        let stream = |white: f64, flicker: f64, seed: u64, rate: f64, block: usize| {
            let s = NoiseStream::with_hold(white, flicker, rate, seed, block, hold);
            (plan.noise && !s.is_silent()).then_some(s)
        };
        let stage_noise: Vec<Option<NoiseStream>> = plan
            .stages
            .iter()
            .map(|s| stream(s.noise_white, s.noise_flicker, s.noise_seed, fs, b))
            .collect();
        let nbuf = stage_noise
            .iter()
            .map(|s| {
                if s.is_some() {
                    vec![0.0; b]
                } else {
                    Vec::new()
                }
            })
            .collect();
        let out_noise: Vec<Option<NoiseStream>> = plan
            .outputs
            .iter()
            .map(|o| stream(o.noise_density, 0.0, o.noise_seed, plan.rate, b / kf))
            .collect();
        let obuf = if out_noise.iter().any(Option::is_some) {
            vec![0.0; b / kf]
        } else {
            Vec::new()
        };
        let mut e = Engine {
            feeds: all,
            bufs,
            states,
            saved,
            xbuf: vec![0.0; b],
            ovbuf: vec![f64::NAN; b],
            pbuf: vec![0.0; b],
            qbuf: vec![0.0; b],
            decims,
            out_base,
            stage_noise,
            nbuf,
            out_noise,
            obuf,
            pos: 0,
            avail: 0,
            skip: plan.discard,
            fast: true,
            group_kernels: true,
            fast_blocks: 0,
            full_blocks: 0,
            weak: plan
                .stages
                .iter()
                .map(|sp| WeakStep::new(sp, 1.0 / plan.internal_rate))
                .collect(),
            nets: plan.networks.iter().map(|n| NetRun::new(n, b)).collect(),
            steps: 0,
            failure: None,
            blocks: 0,
            plan,
        };
        e.reset();
        e
    }

    /// The plan this engine runs.
    pub fn plan(&self) -> &Plan {
        &self.plan
    }

    /// Enable or disable the block-linear fast path (for verification; on by default).
    pub fn set_fast_path(&mut self, on: bool) {
        self.fast = on;
    }

    /// Run network groups on their small-group kernels (`circuit::small`; on by default) or
    /// on the generic per-sample path, their plain reference (for verification).
    pub fn set_group_kernels(&mut self, on: bool) {
        self.group_kernels = on;
    }

    /// Number of (stage, block) pairs run by the fast path and by the full model.
    pub fn path_counts(&self) -> (u64, u64) {
        (self.fast_blocks, self.full_blocks)
    }

    /// Number of (group, internal step) pairs of the network stages run by the linear fast
    /// path and by the nonlinear step.
    pub fn network_step_counts(&self) -> (u64, u64) {
        self.nets.iter().fold((0, 0), |(a, b), n| {
            (a + n.state.counts.0, b + n.state.counts.1)
        })
    }

    /// The first step of a network stage that failed (the render after it holds the last
    /// value), if any.
    pub fn failure(&self) -> Option<&EngineError> {
        self.failure.as_ref()
    }

    /// Back to the start: reproduces a render bit for bit. Does not allocate.
    pub fn reset(&mut self) {
        for f in &mut self.feeds {
            f.reset();
        }
        let hist = self.plan.history;
        for (i, s) in self.plan.sources.iter().enumerate() {
            self.bufs[i][..hist].fill(s.rest);
        }
        for (sp, st) in self.plan.stages.iter().zip(self.states.iter_mut()) {
            self.bufs[sp.node][..hist].fill(sp.shaper.apply(sp.rest_v));
            st.v = sp.rest_v;
            st.p_prev = sp.rest_p;
            st.p_prev2 = sp.rest_p;
            st.p_prev3 = sp.rest_p;
            st.p_prev4 = sp.rest_p;
            st.mode = 0;
            st.pend = [0.0; 2];
            st.rv = RevState::REST;
            st.vc.copy_from_slice(&sp.rest_vc);
            st.vf = sp.rest_vf;
            st.xh = [sp.rest_v; WINDOW - 1];
            st.clip = 0;
            st.slew = 0;
            st.cm = 0;
            st.rev = 0;
            st.out_max = f64::NEG_INFINITY;
            st.out_min = f64::INFINITY;
            st.first_clip = None;
        }
        for (np, nr) in self.plan.networks.iter().zip(self.nets.iter_mut()) {
            nr.reset(np);
            self.bufs[np.node][..hist].fill(np.rest_out);
            for &(n, b) in &np.exports {
                self.bufs[b][..hist].fill(np.rest.vn[n]);
            }
        }
        self.steps = 0;
        self.failure = None;
        for (d, o) in self.decims.iter_mut().zip(&self.plan.outputs) {
            d.reset(o.rest);
        }
        for s in self
            .stage_noise
            .iter_mut()
            .chain(self.out_noise.iter_mut())
            .flatten()
        {
            s.reset();
        }
        self.pos = 0;
        self.avail = 0;
        self.skip = self.plan.discard;
        self.fast_blocks = 0;
        self.full_blocks = 0;
        self.blocks = 0;
    }

    /// Event durations per op-amp stage (and per op-amp of every network, by its name) so
    /// far, seconds.
    pub fn events(&self) -> Vec<StageEvents> {
        let h = 1.0 / self.plan.internal_rate;
        let preroll = self.plan.preroll as f64;
        let mut v: Vec<StageEvents> = self
            .plan
            .stages
            .iter()
            .zip(&self.states)
            .map(|(sp, st)| StageEvents {
                stage: sp.name.clone(),
                clip_s: st.clip as f64 * h,
                slew_s: st.slew as f64 * h,
                cm_out_s: st.cm as f64 * h,
                reversed_s: st.rev as f64 * h,
                // the clip counted at buffer index j is the drive of index j - lookahead,
                // which the stage computed from source samples `latency - lookahead` earlier
                first_clip_s: st
                    .first_clip
                    .map(|j| (j as f64 - sp.latency as f64 - preroll) * h),
                peak_pos_v: (st.out_max.is_finite()).then_some(st.out_max),
                peak_neg_v: (st.out_min.is_finite()).then_some(st.out_min),
            })
            .collect();
        for (np, nr) in self.plan.networks.iter().zip(&self.nets) {
            // a step at buffer time t reads inputs of source time t - (latency - lookahead) h
            let lag = (np.latency as f64 - LOOKAHEAD as f64) * h;
            for ((a, ev), &(lo, hi)) in np
                .circuit
                .circuit
                .amps
                .iter()
                .zip(&nr.state.events)
                .zip(&nr.peaks)
            {
                v.push(StageEvents {
                    stage: a.name.clone(),
                    clip_s: ev.clip as f64 * h,
                    slew_s: ev.slew as f64 * h,
                    cm_out_s: ev.cm as f64 * h,
                    reversed_s: ev.rev as f64 * h,
                    first_clip_s: ev.first_clip_s.map(|t| t - lag),
                    peak_pos_v: hi.is_finite().then_some(hi),
                    peak_neg_v: lo.is_finite().then_some(lo),
                });
            }
        }
        v
    }

    /// Fill the next base-rate frames of every output. All slices should have the same
    /// length (the shortest one sets how many frames are produced); slices beyond the number
    /// of outputs are left untouched.
    pub fn process(&mut self, outs: &mut [&mut [f64]]) {
        let n = outs.iter().map(|o| o.len()).min().unwrap_or(0);
        let no = self.plan.outputs.len().min(outs.len());
        let mut done = 0;
        while done < n {
            if self.pos >= self.avail {
                self.block();
                continue;
            }
            let m = (self.avail - self.pos).min(n - done);
            for (o, out) in outs.iter_mut().enumerate().take(no) {
                out[done..done + m].copy_from_slice(&self.out_base[o][self.pos..self.pos + m]);
            }
            self.pos += m;
            done += m;
        }
    }

    /// Compute one internal block and decimate it (with AVX2 code generation where the CPU
    /// has it: the same arithmetic, wider vectors, so results do not change).
    fn block(&mut self) {
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU supports AVX2 (checked just above).
                unsafe { self.block_avx2() };
                return;
            }
        }
        self.block_impl();
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn block_avx2(&mut self) {
        self.block_impl();
    }

    #[inline(always)]
    fn block_impl(&mut self) {
        let b = self.plan.block;
        let hist = self.plan.history;
        for (i, f) in self.feeds.iter_mut().enumerate() {
            f.fill(&mut self.bufs[i][hist..hist + b]);
        }
        // Noise of the block, generated once before the path decision so that the fast path
        // and the full model see the same samples.
        for (s, nb) in self.stage_noise.iter_mut().zip(self.nbuf.iter_mut()) {
            if let Some(s) = s {
                s.fill(nb);
            }
        }
        let h = 1.0 / self.plan.internal_rate;
        let t0 = (self.steps as f64 - self.plan.preroll as f64) * h;
        for step in 0..self.plan.order.len() {
            let si = match self.plan.order[step] {
                StageStep::Op(si) => si,
                StageStep::Net(ni) => {
                    let np = &self.plan.networks[ni];
                    let mut own = std::mem::take(&mut self.bufs[np.node]);
                    let nr = &mut self.nets[ni];
                    let r = net_block(
                        np,
                        nr,
                        &self.bufs,
                        hist,
                        &mut own[hist..hist + b],
                        self.fast,
                        self.group_kernels,
                        self.plan.antialias,
                        t0,
                    );
                    self.bufs[np.node] = own;
                    for (k, &(_, eb)) in np.exports.iter().enumerate() {
                        let dst = &mut self.bufs[eb][hist..hist + b];
                        let ring = &mut nr.ex_hist[k];
                        crate::engine::network::delay_block(
                            ring,
                            LOOKAHEAD,
                            &nr.ex_vals[k][..b],
                            dst,
                        );
                    }
                    if let Err(e) = r {
                        if self.failure.is_none() {
                            self.failure = Some(EngineError::Circuit {
                                stage: np.name.clone(),
                                message: e.to_string(),
                            });
                        }
                    }
                    continue;
                }
            };
            let sp = &self.plan.stages[si];
            let noise = self.stage_noise[si]
                .as_ref()
                .map(|_| self.nbuf[si].as_slice());
            let mut own = std::mem::take(&mut self.bufs[sp.node]);
            let st = &mut self.states[si];
            let mut ok = false;
            st.rv.blk = false;
            // a corner correction still to add to the next sample needs the sample loop
            if self.fast && st.pend == [0.0; 2] && st.rv.ofut == 0 {
                self.saved[si].restore_from(st);
                ok = linear_block(
                    sp,
                    st,
                    &self.bufs,
                    hist,
                    noise,
                    &mut self.xbuf,
                    &mut self.pbuf,
                    &mut self.qbuf,
                );
                if ok {
                    st.mode = 0;
                    self.fast_blocks += 1;
                    if sp.reversal {
                        st.rv.on = false;
                        st.rv.vp2 = vp_at(sp, &self.bufs, hist, b - 2);
                        st.rv.vp1 = vp_at(sp, &self.bufs, hist, b - 1);
                    }
                } else {
                    st.restore_from(&self.saved[si]);
                }
            }
            if !ok {
                self.full_blocks += 1;
                if self.fast {
                    // Issue 13: the block is not linear throughout; take the linear step for
                    // each sample that stays linear and the full step only around events.
                    hybrid_block(
                        sp,
                        st,
                        &self.bufs,
                        hist,
                        noise,
                        &mut self.xbuf,
                        1.0 / self.plan.internal_rate,
                        self.weak[si].as_ref(),
                        &mut self.pbuf,
                        &mut self.qbuf,
                        &mut self.ovbuf,
                        self.plan.antialias,
                    );
                } else {
                    // The plain reference: the full model at every sample.
                    full_block(
                        sp,
                        st,
                        &self.bufs,
                        hist,
                        noise,
                        &mut self.xbuf,
                        &mut self.ovbuf,
                        1.0 / self.plan.internal_rate,
                        self.plan.antialias,
                    );
                }
            }
            // overrides of a reversing stage's edges, this block's or the history's
            let ov = if st.rv.blk {
                Some(self.ovbuf.as_slice())
            } else if st.rv.oh.iter().any(|o| !o.is_nan()) {
                self.ovbuf.fill(f64::NAN);
                Some(self.ovbuf.as_slice())
            } else {
                None
            };
            shape_block(
                sp,
                st,
                &self.xbuf,
                ov,
                &mut own[hist..hist + b],
                self.plan.antialias,
                self.blocks * b as u64,
            );
            self.bufs[sp.node] = own;
        }
        let kf = self.plan.oversample;
        for (o, op) in self.plan.outputs.iter().enumerate() {
            let src = &self.bufs[op.node][hist - op.delay..hist - op.delay + b];
            self.decims[o].process_scaled(src, op.gain, &mut self.out_base[o][..b / kf]);
            if let Some(ns) = &mut self.out_noise[o] {
                // Thermal noise of the output's resistances (white, independent of the
                // circuit), added at the base rate after decimation with the density it has
                // in band (issue 13: K times fewer draws than at the internal rate).
                ns.fill(&mut self.obuf);
                for (y, n) in self.out_base[o][..b / kf].iter_mut().zip(&self.obuf) {
                    *y += n;
                }
            }
        }
        for buf in self.bufs.iter_mut() {
            buf.copy_within(b..b + hist, 0);
        }
        self.steps += b as u64;
        self.blocks += 1;
        self.avail = b / kf;
        self.pos = self.skip.min(self.avail);
        self.skip -= self.pos;
    }
}

#[inline(always)]
#[allow(clippy::too_many_arguments)]
/// The linear recursion over a block; returns false (state to be restored) when a sample came
/// near a limit.
fn linear_block(
    sp: &StagePlan,
    st: &mut StageState,
    bufs: &[Vec<f64>],
    hist: usize,
    noise: Option<&[f64]>,
    x: &mut [f64],
    p: &mut [f64],
    q: &mut [f64],
) -> bool {
    let b = x.len();
    let (e, a1, a0, bcoef) = (sp.lin_e, sp.lin_a1, sp.lin_a0, sp.b);
    let vd_max = FAST_VD * sp.vov;
    let (slo, shi) = (sp.state_lo, sp.state_hi);
    let margin = if sp.reversal {
        20.0 * super::plan::CM_DELTA
    } else {
        0.0
    };
    let has_caps = sp.fb_cap.is_some() || sp.minus.iter().any(|m| m.cap.is_some());
    // V+ over the block, checked against the common-mode range.
    let c0 = sp.plus_const - sp.minus_const;
    if let Some(pi) = &sp.plus {
        let src = &bufs[pi.node][hist - pi.delay..hist - pi.delay + b];
        let mut mn = f64::INFINITY;
        let mut mx = f64::NEG_INFINITY;
        for (d, s) in p.iter_mut().zip(src) {
            let vp = sp.plus_const + pi.gain * s;
            mn = mn.min(vp);
            mx = mx.max(vp);
            *d = vp - sp.minus_const;
        }
        if let Some((cl, ch)) = sp.cm {
            if mn < cl + margin || mx > ch - margin {
                return false;
            }
        }
    } else {
        if let Some((cl, ch)) = sp.cm {
            if sp.plus_const < cl + margin || sp.plus_const > ch - margin {
                return false;
            }
        }
        if has_caps || sp.minus.len() < 2 {
            p.fill(c0);
        }
    }
    if !has_caps {
        // inputs two at a time (one pass over the block per pair); without a V+ input the
        // first pass also writes the constant
        let mut pairs = sp.minus.chunks_exact(2);
        let mut fresh = sp.plus.is_none();
        for pr in &mut pairs {
            let (w0, w1) = (pr[0].mu * pr[0].gain, pr[1].mu * pr[1].gain);
            let s0 = &bufs[pr[0].node][hist - pr[0].delay..hist - pr[0].delay + b];
            let s1 = &bufs[pr[1].node][hist - pr[1].delay..hist - pr[1].delay + b];
            if fresh {
                for ((d, a), c) in p.iter_mut().zip(s0).zip(s1) {
                    *d = c0 - (w0 * a + w1 * c);
                }
                fresh = false;
            } else {
                for ((d, a), c) in p.iter_mut().zip(s0).zip(s1) {
                    *d -= w0 * a + w1 * c;
                }
            }
        }
        for m in pairs.remainder() {
            let w = m.mu * m.gain;
            let src = &bufs[m.node][hist - m.delay..hist - m.delay + b];
            for (d, s) in p.iter_mut().zip(src) {
                *d -= w * s;
            }
        }
        if let Some(nz) = noise {
            for (d, n) in p.iter_mut().zip(nz) {
                *d += n;
            }
        }
        let mut ok = true;
        if e * e <= 1e-17 && b > 2 {
            // Memory of at most one step: v[n] = q[n] + e q[n-1] (the dropped term e^2 v[n-2]
            // is below 1e-17 relative), q[n] = a1 p[n] + a0 p[n-1]: a three-tap FIR on p,
            // fused with the checks.
            let (c0, c1, c2) = if e <= 1e-17 {
                (a1, a0, 0.0)
            } else {
                (a1, a0 + e * a1, e * a0)
            };
            let (pp1, pp2) = (st.p_prev, st.p_prev2);
            x[0] = c0 * p[0] + c1 * pp1 + c2 * pp2;
            x[1] = c0 * p[1] + c1 * p[0] + c2 * pp1;
            let mut ok = true;
            for (&pn, &v) in p[..2].iter().zip(&x[..2]) {
                ok &= ((pn - bcoef * v).abs() <= vd_max) & (v >= slo) & (v <= shi);
            }
            for (((xo, &pn), &pm1), &pm2) in x[2..]
                .iter_mut()
                .zip(&p[2..])
                .zip(&p[1..b - 1])
                .zip(&p[..b - 2])
            {
                let v = c0 * pn + c1 * pm1 + c2 * pm2;
                *xo = v;
                ok &= ((pn - bcoef * v).abs() <= vd_max) & (v >= slo) & (v <= shi);
            }
            if !ok {
                return false;
            }
            st.v = x[b - 1];
            // the history shifted by the block (`b >= 2` here)
            let old = [st.p_prev4, st.p_prev3, st.p_prev2, st.p_prev];
            let back = |j: usize| if b >= j { p[b - j] } else { old[4 + b - j] };
            st.p_prev4 = back(4);
            st.p_prev3 = back(3);
            st.p_prev = p[b - 1];
            st.p_prev2 = p[b - 2];
            return true;
        }
        // q[n] = a1 p[n] + a0 p[n-1], then v[n] = e v[n-1] + q[n].
        q[0] = a1 * p[0] + a0 * st.p_prev;
        for ((qo, &pn), &pp) in q[1..].iter_mut().zip(&p[1..]).zip(&p[..b - 1]) {
            *qo = a1 * pn + a0 * pp;
        }
        // Memory depth: the smallest m with e^m below 1e-17 (the previous outputs' weight
        // beyond m steps is negligible). Up to four taps the recursion is unrolled into a
        // short FIR on q (no serial dependency); otherwise it runs serially.
        let mut depth = 0usize;
        let mut em = 1.0;
        while em > 1e-17 && depth < 5 {
            em *= e;
            depth += 1;
        }
        if depth <= 4 && b > 8 {
            let mut v = st.v;
            for (xo, &qn) in x.iter_mut().zip(q.iter()).take(depth) {
                v = e * v + qn;
                *xo = v;
            }
            let (e2, e3) = (e * e, e * e * e);
            let n = b - depth;
            let (q0, q1, q2, q3) = (
                &q[depth..],
                &q[depth - 1..],
                &q[depth.max(2) - 2..],
                &q[depth.max(3) - 3..],
            );
            let xs = &mut x[depth..];
            match depth {
                1 => xs.copy_from_slice(&q0[..n]),
                2 => {
                    for ((xo, a), b1) in xs.iter_mut().zip(&q0[..n]).zip(&q1[..n]) {
                        *xo = a + e * b1;
                    }
                }
                3 => {
                    for (((xo, a), b1), c) in
                        xs.iter_mut().zip(&q0[..n]).zip(&q1[..n]).zip(&q2[..n])
                    {
                        *xo = a + e * b1 + e2 * c;
                    }
                }
                _ => {
                    for ((((xo, a), b1), c), d) in xs
                        .iter_mut()
                        .zip(&q0[..n])
                        .zip(&q1[..n])
                        .zip(&q2[..n])
                        .zip(&q3[..n])
                    {
                        *xo = a + e * b1 + e2 * c + e3 * d;
                    }
                }
            }
        } else {
            let mut v = st.v;
            for (xo, &qn) in x.iter_mut().zip(q.iter()) {
                v = e * v + qn;
                *xo = v;
            }
        }
        for (&v, &pn) in x.iter().zip(p.iter()) {
            ok &= ((pn - bcoef * v).abs() <= vd_max) & (v >= slo) & (v <= shi);
        }
        if !ok {
            return false;
        }
        st.v = x[b - 1];
        // the history shifted by the block (`b >= 2` here)
        let old = [st.p_prev4, st.p_prev3, st.p_prev2, st.p_prev];
        let back = |j: usize| if b >= j { p[b - j] } else { old[4 + b - j] };
        st.p_prev4 = back(4);
        st.p_prev3 = back(3);
        st.p_prev = p[b - 1];
        st.p_prev2 = p[b - 2];
        return true;
    }
    // With capacitors: per-sample companion updates.
    if let Some(nz) = noise {
        for (d, n) in p.iter_mut().zip(nz) {
            *d += n;
        }
    }
    let mut v = st.v;
    let mut pp = st.p_prev;
    let mut pp2 = st.p_prev2;
    let mut pp3 = st.p_prev3;
    let mut pp4 = st.p_prev4;
    for t in 0..b {
        let mut mrest = 0.0;
        for (m, vc) in sp.minus.iter().zip(st.vc.iter()) {
            let s = bufs[m.node][hist - m.delay + t];
            mrest += m.mu * (m.gain * s - vc);
        }
        if let Some(fc) = &sp.fb_cap {
            mrest -= fc.mu * st.vf;
        }
        let pn = p[t] - mrest;
        v = e * v + a1 * pn + a0 * pp;
        pp4 = pp3;
        pp3 = pp2;
        pp2 = pp;
        pp = pn;
        x[t] = v;
        if (pn - bcoef * v).abs() > vd_max || v < slo || v > shi || !v.is_finite() {
            return false;
        }
        let vminus = sp.minus_const + mrest + bcoef * v;
        for (m, vc) in sp.minus.iter().zip(st.vc.iter_mut()) {
            if m.cap.is_some() {
                let s = bufs[m.node][hist - m.delay + t];
                *vc += (1.0 - m.decay) * (m.gain * s - vminus - *vc);
            }
        }
        if sp.fb_cap.is_some() {
            st.vf = 2.0 * (v - vminus) - st.vf;
        }
    }
    st.v = v;
    st.p_prev = pp;
    st.p_prev2 = pp2;
    st.p_prev3 = pp3;
    st.p_prev4 = pp4;
    true
}

/// V+ of a stage at sample `t` of the block.
#[inline]
fn vp_at(sp: &StagePlan, bufs: &[Vec<f64>], hist: usize, t: usize) -> f64 {
    match &sp.plus {
        Some(pi) => sp.plus_const + pi.gain * bufs[pi.node][hist - pi.delay + t],
        None => sp.plus_const,
    }
}

/// A reversing stage's step through its edges (issue 16, [`RevState`]): the step in which
/// the reversal factor `f` turns negative (the input leaves its range at the instant
/// [`crossing`] finds on V+), the steps wholly reversed (a ramp at the slew rate, held at
/// the state's limit) and the step in which it turns positive again, as
/// [`SlewStep::enter_reversal`], [`SlewStep::reversed`] and [`SlewStep::leave_reversal`];
/// `None` for any other step (and for a loop too slow for the sharp model), which then
/// takes the stage's usual step. Keeps the V+ history and the reversed flag.
#[inline]
fn rev_step(
    sp: &StagePlan,
    st: &mut StageState,
    ev: &SlewStep,
    vp: f64,
    v: f64,
) -> Option<Stepped> {
    let cm = sp.cm?;
    let was = st.rv.on;
    let vph = [st.rv.vp2, st.rv.vp1];
    st.rv.vp2 = st.rv.vp1;
    st.rv.vp1 = vp;
    st.rv.on = ev.f <= 0.0;
    let (sw, hold) = Swing::pair(sp.shaper.lo, sp.shaper.hi, sp.state_lo, sp.state_hi);
    let r = super::edges::reversal_step(ev, cm, was, st.rv.ret, vph, vp, v, st.mode, sw, hold);
    st.rv.ret = r.is_some_and(|r| r.ret);
    r
}

/// The corners of `r`, an ordinary step of a reversing stage, as they reach the output: all
/// of them, except in the samples after a reversal edge, whose output is the static clamp of
/// the drive plus the corners' corrections ([`RevState`]): there only those inside the swing
/// ([`SlewStep::visible`]).
#[inline]
fn visible(sp: &StagePlan, st: &StageState, ev: &SlewStep, r: Stepped) -> Stepped {
    if st.rv.ofut > 0 {
        let sw = Swing {
            lo: sp.shaper.lo,
            hi: sp.shaper.hi,
        };
        ev.visible(&r, sw)
    } else {
        r
    }
}

/// The drive a step leaves: its end value `xn`, or, for a reversed step (`reversed`) whose
/// state was held at the end its ramp runs to (`v`, the held state), the drive the
/// following held steps give (a ramp on, no kink at the rail). Not a state held where the
/// ramp starts (a reversal from past a rail whose ramp has not left it by the step's end).
#[inline]
fn step_drive(reversed: bool, ev: &SlewStep, mode: i8, xn: f64, v: f64) -> f64 {
    if reversed && (xn - v) * f64::from(mode) > 0.0 {
        v + ev.ramp(f64::from(mode), v)
    } else {
        xn
    }
}

/// The full model over a block: slew (implicit phi), common-mode range and reversal, state
/// clamp, events.
#[allow(clippy::too_many_arguments)]
fn full_block(
    sp: &StagePlan,
    st: &mut StageState,
    bufs: &[Vec<f64>],
    hist: usize,
    noise: Option<&[f64]>,
    x: &mut [f64],
    ov: &mut [f64],
    h: f64,
    aa: bool,
) {
    let b = x.len();
    let kh = std::f64::consts::TAU * sp.gbw * h;
    let kgain = std::f64::consts::TAU * sp.gbw;
    let delta_inv = 1.0 / super::plan::CM_DELTA;
    let mut v = st.v;
    let mut pp = st.p_prev;
    let mut pp2 = st.p_prev2;
    let mut pp3 = st.p_prev3;
    let mut pp4 = st.p_prev4;
    for t in 0..b {
        let vp = match &sp.plus {
            Some(pi) => sp.plus_const + pi.gain * bufs[pi.node][hist - pi.delay + t],
            None => sp.plus_const,
        };
        let mut mrest = sp.minus_const;
        for (m, vc) in sp.minus.iter().zip(st.vc.iter()) {
            let s = bufs[m.node][hist - m.delay + t];
            mrest += m.mu * (m.gain * s - vc);
        }
        if let Some(fc) = &sp.fb_cap {
            mrest -= fc.mu * st.vf;
        }
        let mut f = 1.0;
        let mut vp_eff = vp;
        if let Some((cl, ch)) = sp.cm {
            if vp < cl || vp > ch {
                st.cm += 1;
            }
            if sp.reversal {
                let m = (vp - cl).min(ch - vp);
                f = (m * delta_inv).tanh();
                if f < 0.0 {
                    st.rev += 1;
                }
            } else {
                vp_eff = vp.clamp(cl, ch.max(cl));
            }
        }
        let pn = vp_eff - mrest + noise.map_or(0.0, |n| n[t]);
        let ev = SlewStep {
            p: [pp4, pp3, pp2, pp, pn],
            f,
            b: sp.b,
            eps: sp.eps,
            kh,
            srh: sp.slew * h,
        };
        let mut corners = None;
        let edge = if sp.reversal {
            rev_step(sp, st, &ev, vp, v)
        } else {
            None
        };
        let xn = if let Some(r) = edge {
            st.mode = r.mode;
            corners = Some(r);
            r.v
        } else if let Some(r) = ev.step_if_eventful(v, st.mode) {
            st.mode = r.mode;
            corners = Some(visible(sp, st, &ev, r));
            r.v
        } else if f > 0.0 {
            st.mode = 0;
            solve(v, pn, pp, sp.b, sp.eps, f, kh, sp.vov)
        } else {
            st.mode = 0;
            let vd = f * (pn - sp.b * v);
            v + h * (sp.slew * (vd / sp.vov).tanh() - kgain * sp.eps * v)
        };
        let xn = if xn.is_finite() { xn } else { v };
        v = xn.clamp(sp.state_lo, sp.state_hi);
        x[t] = step_drive(edge.is_some() && f <= 0.0, &ev, st.mode, xn, v);
        x[t] += st.pend[0];
        st.pend = [st.pend[1], 0.0];
        if edge.is_some() || st.rv.ofut > 0 {
            st.rv
                .after(ov, x, &st.xh, &sp.shaper, t, corners.as_ref(), aa);
        } else if let (Some(r), true) = (corners, aa) {
            let w = add_corners(&r, x, t, &mut st.xh);
            st.pend[0] += w[0];
            st.pend[1] += w[1];
        }
        // Slewing: the drive is past the linear range and the output is free to move. Not
        // while it is held at the swing (or current) limit, and not while latched by a phase
        // reversal (f <= 0).
        let held = xn <= sp.state_lo || xn >= sp.state_hi;
        if f > 0.0 && !held && (f * (pn - sp.b * v)).abs() > sp.vov {
            st.slew += 1;
        }
        let vminus = mrest + sp.b * v;
        for (m, vc) in sp.minus.iter().zip(st.vc.iter_mut()) {
            if m.cap.is_some() {
                let s = bufs[m.node][hist - m.delay + t];
                *vc += (1.0 - m.decay) * (m.gain * s - vminus - *vc);
            }
        }
        if sp.fb_cap.is_some() {
            st.vf = 2.0 * (v - vminus) - st.vf;
        }
        pp4 = pp3;
        pp3 = pp2;
        pp2 = pp;
        pp = pn;
    }
    st.v = v;
    st.p_prev = pp;
    st.p_prev2 = pp2;
    st.p_prev3 = pp3;
    st.p_prev4 = pp4;
}

/// The full model over a block with a per-sample linear shortcut (issue 13, "stay on the
/// fast path for the linear samples of a block"): each sample first tries the fast path's
/// linear step `v = e v0 + a1 p + a0 pp` and keeps it when that sample passes the fast path's
/// own checks (|Vd| below [`FAST_VD`] times Vov, state inside its clamp, V+ inside the
/// common-mode range with the fast path's margin); otherwise it takes the full step exactly as
/// [`full_block`] does. A sample that passes contributes no event (|Vd| < Vov, no clamp, V+ in
/// range), so the events match the full model's. Self-contained (it reads only the plan's
/// stage and the block buffers), so it carries over to another engine core unchanged.
#[allow(clippy::too_many_arguments)]
fn hybrid_block(
    sp: &StagePlan,
    st: &mut StageState,
    bufs: &[Vec<f64>],
    hist: usize,
    noise: Option<&[f64]>,
    x: &mut [f64],
    h: f64,
    weak: Option<&WeakStep>,
    vpa: &mut [f64],
    mra: &mut [f64],
    ov: &mut [f64],
    aa: bool,
) {
    let b = x.len();
    let kh = std::f64::consts::TAU * sp.gbw * h;
    let srh = sp.slew * h;
    let kgain = std::f64::consts::TAU * sp.gbw;
    let delta_inv = 1.0 / super::plan::CM_DELTA;
    let (le, la1, la0) = (sp.lin_e, sp.lin_a1, sp.lin_a0);
    let vd_max = FAST_VD * sp.vov;
    let (slo, shi) = (sp.state_lo, sp.state_hi);
    // V+ range where the linear step applies: the fast path's margin for reversing parts
    // (tanh(20) is 1 in f64), none otherwise (V+ is then used unclamped).
    let lin_cm = sp.cm.map(|(cl, ch)| {
        let m = if sp.reversal {
            20.0 * super::plan::CM_DELTA
        } else {
            0.0
        };
        (cl + m, ch - m)
    });
    let has_caps = sp.fb_cap.is_some() || sp.minus.iter().any(|m| m.cap.is_some());
    let consts = StepConsts::new(sp, kh);
    // Without capacitors V+ and `mrest` do not depend on the state: computed for the whole
    // block first (vectorised), read back in the serial loop.
    if !has_caps {
        vpa.fill(sp.plus_const);
        if let Some(pi) = &sp.plus {
            let src = &bufs[pi.node][hist - pi.delay..hist - pi.delay + b];
            for (d, s) in vpa.iter_mut().zip(src) {
                *d += pi.gain * s;
            }
        }
        mra.fill(sp.minus_const);
        for m in &sp.minus {
            let src = &bufs[m.node][hist - m.delay..hist - m.delay + b];
            let w = m.mu * m.gain;
            for (d, s) in mra.iter_mut().zip(src) {
                *d += w * s;
            }
        }
        if let Some(nz) = noise {
            for (d, n) in mra.iter_mut().zip(nz) {
                *d -= n;
            }
        }
    }
    let mut v = st.v;
    let mut pp = st.p_prev;
    let mut pp2 = st.p_prev2;
    let mut pp3 = st.p_prev3;
    let mut pp4 = st.p_prev4;
    // corrections of the next sample: carried from the last step, made by this one
    let mut pend = st.pend;
    for t in 0..b {
        let (vp, mrest, nz) = if has_caps {
            let vp = match &sp.plus {
                Some(pi) => sp.plus_const + pi.gain * bufs[pi.node][hist - pi.delay + t],
                None => sp.plus_const,
            };
            let mut mrest = sp.minus_const;
            for (m, vc) in sp.minus.iter().zip(st.vc.iter()) {
                let s = bufs[m.node][hist - m.delay + t];
                mrest += m.mu * (m.gain * s - vc);
            }
            if let Some(fc) = &sp.fb_cap {
                mrest -= fc.mu * st.vf;
            }
            (vp, mrest, noise.map_or(0.0, |n| n[t]))
        } else {
            // the noise is folded into mrest here (subtracted above)
            (vpa[t], mra[t], 0.0)
        };
        let in_range = lin_cm.is_none_or(|(cl, ch)| vp >= cl && vp <= ch);
        let mut linear = false;
        if in_range {
            let pn = vp - mrest + nz;
            let vl = le * v + la1 * pn + la0 * pp;
            // Linear before the step (the full step's phi comes from the error voltage at the
            // step's start, with the mean target) and after it (as the block check).
            let pre = (0.5 * (pn + pp) - sp.b * v).abs() <= vd_max;
            if pre && (pn - sp.b * vl).abs() <= vd_max && vl >= slo && vl <= shi {
                linear = true;
                st.mode = 0;
                v = vl;
                x[t] = vl;
                pp4 = pp3;
                pp3 = pp2;
                pp2 = pp;
                pp = pn;
                if sp.reversal {
                    st.rv.vp2 = st.rv.vp1;
                    st.rv.vp1 = vp;
                    st.rv.on = false;
                }
            }
        }
        let mut corners = None;
        let mut edge = None;
        if !linear {
            let mut f = 1.0;
            let mut vp_eff = vp;
            if let Some((cl, ch)) = sp.cm {
                if sp.reversal {
                    let m = (vp - cl).min(ch - vp);
                    f = super::fastmath::tanh(m * delta_inv);
                    if f < 0.0 {
                        st.rev += 1;
                    }
                } else {
                    vp_eff = vp.clamp(cl, ch.max(cl));
                }
            }
            let pn = vp_eff - mrest + nz;
            let zr = (0.5 * (pn + pp) - sp.b * v) * weak.map_or(0.0, |w| w.inv_vov);
            let w2 = zr * zr;
            let ev = SlewStep {
                p: [pp4, pp3, pp2, pp, pn],
                f,
                b: sp.b,
                eps: sp.eps,
                kh,
                srh,
            };
            if sp.reversal {
                edge = rev_step(sp, st, &ev, vp, v);
            }
            let xn = if let Some(r) = edge {
                st.mode = r.mode;
                corners = Some(r);
                r.v
            } else if let Some(r) = ev.step_if_eventful(v, st.mode) {
                st.mode = r.mode;
                corners = Some(visible(sp, st, &ev, r));
                r.v
            } else if let (Some(ws), true) = (weak, f == 1.0 && w2 < WEAK_W) {
                st.mode = 0;
                let (t, t2) = (w2, w2 * w2);
                let t4 = t2 * t2;
                let ve = poly8(&ws.e, t, t2, t4) * v
                    + poly8(&ws.a1, t, t2, t4) * pn
                    + poly8(&ws.a0, t, t2, t4) * pp;
                let dmax = kh * (sp.vov + sp.eps * v.abs());
                v + (ve - v).clamp(-dmax, dmax)
            } else if f > 0.0 {
                st.mode = 0;
                solve_fast(v, pn, pp, sp.b, sp.eps, f, sp.vov, &consts)
            } else {
                st.mode = 0;
                let vd = f * (pn - sp.b * v);
                v + h * (sp.slew * super::fastmath::tanh(vd / sp.vov) - kgain * sp.eps * v)
            };
            let xn = if xn.is_finite() { xn } else { v };
            v = xn.clamp(slo, shi);
            x[t] = step_drive(edge.is_some() && f <= 0.0, &ev, st.mode, xn, v);
            // Slewing, counted as in `full_block`: not while held at the swing (or current)
            // limit, nor while latched by a phase reversal (f <= 0).
            let held = xn <= slo || xn >= shi;
            if f > 0.0 && !held && (f * (pn - sp.b * v)).abs() > sp.vov {
                st.slew += 1;
            }
            pp4 = pp3;
            pp3 = pp2;
            pp2 = pp;
            pp = pn;
        }
        if pend[0] != 0.0 {
            x[t] += pend[0];
        }
        pend = [pend[1], 0.0];
        if edge.is_some() || st.rv.ofut > 0 {
            st.rv
                .after(ov, x, &st.xh, &sp.shaper, t, corners.as_ref(), aa);
        } else if let (Some(r), true) = (corners, aa) {
            let w = add_corners(&r, x, t, &mut st.xh);
            pend[0] += w[0];
            pend[1] += w[1];
        }
        if let Some((cl, ch)) = sp.cm {
            if vp < cl || vp > ch {
                st.cm += 1;
            }
        }
        if has_caps {
            let vminus = mrest + sp.b * v;
            for (m, vc) in sp.minus.iter().zip(st.vc.iter_mut()) {
                if m.cap.is_some() {
                    let s = bufs[m.node][hist - m.delay + t];
                    *vc += (1.0 - m.decay) * (m.gain * s - vminus - *vc);
                }
            }
            if sp.fb_cap.is_some() {
                st.vf = 2.0 * (v - vminus) - st.vf;
            }
        }
    }
    st.v = v;
    st.p_prev = pp;
    st.p_prev2 = pp2;
    st.p_prev3 = pp3;
    st.p_prev4 = pp4;
    st.pend = pend;
}

/// Adds the band-limited corrections of a step's slope corners ([`corner6`]) to the drive:
/// the step ends at `x[t]`; the three samples before it are `x[t - 1]` .. `x[t - 3]` or, at
/// the head of a block, the newest samples of the clamp's history (not yet shaped: the
/// clamp runs after the block); the corrections of the next two samples are returned, to
/// add once they exist.
#[inline]
fn add_corners(r: &Stepped, x: &mut [f64], t: usize, xh: &mut [f64; WINDOW - 1]) -> [f64; 2] {
    const H: usize = WINDOW - 1;
    let w = corner_weights(r);
    x[t] += w[3];
    for back in 1..=3 {
        let wb = w[3 - back];
        if t >= back {
            x[t - back] += wb;
        } else {
            xh[H + t - back] += wb;
        }
    }
    [w[4], w[5]]
}

/// Output clipper with [`LOOKAHEAD`] samples of lookahead: writes y[n - LOOKAHEAD] at
/// position n.
#[inline(always)]
fn shape_block(
    sp: &StagePlan,
    st: &mut StageState,
    x: &[f64],
    ov: Option<&[f64]>,
    out: &mut [f64],
    aa: bool,
    start: u64,
) {
    const H: usize = WINDOW - 1;
    let sh = sp.shaper;
    let (lin_lo, lin_hi) = (sh.lo + sh.w, sh.hi - sh.w);
    let mut h = st.xh;
    let b = x.len();
    // Whole block strictly inside the linear region: the output is the drive, LOOKAHEAD
    // samples late (same values as the per-sample branch below).
    if b >= 2 * H && ov.is_none() {
        // the windows that reach into the previous block
        let mut e = [0.0; 2 * H];
        e[..H].copy_from_slice(&h);
        e[H..].copy_from_slice(&x[..H]);
        out[..LOOKAHEAD].copy_from_slice(&h[LOOKAHEAD..]);
        out[LOOKAHEAD..].copy_from_slice(&x[..b - LOOKAHEAD]);
        // The cheap pass first: the block's middle samples and the largest second difference
        // bound every window's reach (`shaper::REACH7_PER_E`); when that bound keeps the whole
        // block inside, every window passes `inside7` and the exact pass below would return
        // the same peaks.
        if let Some((pk_lo, pk_hi)) = cheap_inside(&e, x, lin_lo, lin_hi) {
            st.xh.copy_from_slice(&x[b - H..]);
            st.out_min = st.out_min.min(pk_lo);
            st.out_max = st.out_max.max(pk_hi);
            return;
        }
        let first = (0..H).all(|j| {
            let win: &[f64; WINDOW] = e[j..j + WINDOW].try_into().expect("window length");
            sh.inside7(win)
        });
        // One pass of eight independent lanes (compare-and-select, which vectorises): the
        // extremes of the local polynomial's bounds decide "inside" (as `Shaper::inside7`:
        // the three middle samples widened by `reach7`), those of the middle samples are the
        // output's peaks.
        let n = b - H;
        let mut r = [[f64::INFINITY; 8], [f64::NEG_INFINITY; 8]];
        let head = &e[LOOKAHEAD..H + LOOKAHEAD];
        let mut pk = [
            [head.iter().fold(f64::INFINITY, |a, &v| a.min(v)); 8],
            [head.iter().fold(f64::NEG_INFINITY, |a, &v| a.max(v)); 8],
        ];
        let lanes = |r: &mut [[f64; 8]; 2], pk: &mut [[f64; 8]; 2], j: usize, w: [f64; WINDOW]| {
            let a = reach7(&w);
            let (m, c, p) = (w[2], w[3], w[4]);
            let lo3 = if m < c { m } else { c };
            let lo3 = if p < lo3 { p } else { lo3 };
            let hi3 = if m > c { m } else { c };
            let hi3 = if p > hi3 { p } else { hi3 };
            let (d, u) = (lo3 - a, hi3 + a);
            r[0][j] = if d < r[0][j] { d } else { r[0][j] };
            r[1][j] = if u > r[1][j] { u } else { r[1][j] };
            pk[0][j] = if c < pk[0][j] { c } else { pk[0][j] };
            pk[1][j] = if c > pk[1][j] { c } else { pk[1][j] };
        };
        // whole groups of eight windows, each group a fixed-size slice (no bounds checks)
        for blk in x.windows(8 + H).step_by(8) {
            let blk: &[f64; 8 + H] = blk.try_into().expect("group length");
            for j in 0..8 {
                let w: [f64; WINDOW] = std::array::from_fn(|i| blk[i + j]);
                lanes(&mut r, &mut pk, j, w);
            }
        }
        for (k, w) in x.windows(WINDOW).enumerate().skip(n - n % 8) {
            let w: &[f64; WINDOW] = w.try_into().expect("window length");
            lanes(&mut r, &mut pk, k % 8, *w);
        }
        let lo8 = |v: &[f64; 8]| {
            v.iter()
                .fold(f64::INFINITY, |a, &b| if b < a { b } else { a })
        };
        let hi8 = |v: &[f64; 8]| {
            v.iter()
                .fold(f64::NEG_INFINITY, |a, &b| if b > a { b } else { a })
        };
        if first && lo8(&r[0]) > lin_lo && hi8(&r[1]) < lin_hi {
            st.xh.copy_from_slice(&x[b - H..]);
            st.out_min = st.out_min.min(lo8(&pk[0]));
            st.out_max = st.out_max.max(hi8(&pk[1]));
            return;
        }
    }
    let mut clip = 0u64;
    let mut oh = st.rv.oh;
    for (t, (o, &xn)) in out.iter_mut().zip(x).enumerate() {
        let win: [f64; WINDOW] = std::array::from_fn(|i| if i < H { h[i] } else { xn });
        let xc = h[LOOKAHEAD];
        let oc = oh[LOOKAHEAD];
        *o = sh.output7(&win, (!oc.is_nan()).then_some(oc), aa);
        let c = sh.clipping(xc);
        if c && st.first_clip.is_none() {
            st.first_clip = Some(start + t as u64);
        }
        clip += u64::from(c);
        // The circuit's own extremes: the static clamp of the drive (the band-limited value
        // may pass the limit by the kernel's smoothing; that is a property of the file).
        let v = sh.apply(xc);
        st.out_max = st.out_max.max(v);
        st.out_min = st.out_min.min(v);
        h.copy_within(1.., 0);
        h[H - 1] = xn;
        if let Some(ov) = ov {
            oh.copy_within(1.., 0);
            oh[H - 1] = ov[t];
        }
    }
    st.clip += clip;
    st.xh = h;
    st.rv.oh = oh;
}

/// The block pass's cheap test (see [`super::shaper::REACH7_PER_E`]): `head` is the
/// drive's history followed by the block's first samples (`[xh, x[..H]]`), `x` the block
/// (at least `2 H` samples). When every window's middle samples widened by the bound on its
/// reach stay strictly inside `(lo, hi)`, the lowest and highest window centre (the
/// output's peaks over the block); `None` when the bound does not decide it (or a sample
/// is not finite), and the exact pass decides.
#[inline]
pub(crate) fn cheap_inside(
    head: &[f64; 2 * (WINDOW - 1)],
    x: &[f64],
    lo: f64,
    hi: f64,
) -> Option<(f64, f64)> {
    const H: usize = WINDOW - 1;
    let b = x.len();
    // the concatenation s = [xh, x]: window j is s[j..j + 7] for j in 0..b; its middle
    // samples are s[j + 2..=j + 4], its centre s[j + 3], its second differences at
    // s[j + 1..=j + 5]
    let mut emax = 0.0f64;
    for t in 1..2 * H - 1 {
        let e = (head[t + 1] - 2.0 * head[t] + head[t - 1]).abs();
        emax = if e > emax { e } else { emax };
    }
    // second differences at positions 2 H - 1 ..= b + 4 of s (windows of x from H - 2)
    let e2 = max_abs_second_diff(&x[H - 2..b]);
    if !e2.is_finite() {
        return None;
    }
    emax = if e2 > emax { e2 } else { emax };
    // the centres (`head[3..]`, `x[H..b - 3]`) and the middle samples (one more at each
    // end: `head[2]`, `x[b - 3]`) in one pass
    let (p1, q1) = min_max(&head[3..]);
    let (p2, q2) = min_max(&x[H..b - 3]);
    let (pk_lo, pk_hi) = (p1.min(p2), q1.max(q2));
    let (c1, c2) = (head[2], x[b - 3]);
    let mn = pk_lo.min(c1.min(c2));
    let mx = pk_hi.max(c1.max(c2));
    let reach = super::shaper::REACH7_PER_E * emax;
    (emax.is_finite() && mn - reach > lo && mx + reach < hi).then_some((pk_lo, pk_hi))
}

/// The lowest and highest of `xs` (infinities for none), in eight independent lanes so
/// that it vectorises (a NaN is skipped, as the per-sample comparisons skip it).
pub(crate) fn min_max(xs: &[f64]) -> (f64, f64) {
    let mut lo = [f64::INFINITY; 8];
    let mut hi = [f64::NEG_INFINITY; 8];
    let mut chunks = xs.chunks_exact(8);
    for ch in &mut chunks {
        for j in 0..8 {
            let x = ch[j];
            lo[j] = if x < lo[j] { x } else { lo[j] };
            hi[j] = if x > hi[j] { x } else { hi[j] };
        }
    }
    for &x in chunks.remainder() {
        lo[0] = if x < lo[0] { x } else { lo[0] };
        hi[0] = if x > hi[0] { x } else { hi[0] };
    }
    let l = lo
        .iter()
        .fold(f64::INFINITY, |a, &x| if x < a { x } else { a });
    let h = hi
        .iter()
        .fold(f64::NEG_INFINITY, |a, &x| if x > a { x } else { a });
    (l, h)
}

/// The largest `|x[k - 1] - 2 x[k] + x[k + 1]|` over the windows of three of `xs` (0 for
/// none), in eight independent lanes; NaN when any of them is not finite (so any sample
/// of `xs` that is not finite, when `xs` holds three or more).
pub(crate) fn max_abs_second_diff(xs: &[f64]) -> f64 {
    let mut lanes = [0.0f64; 8];
    let mut ok = [true; 8];
    let n = xs.len();
    let mut k = 1;
    while k + 8 < n {
        let w: &[f64; 10] = xs[k - 1..k + 9].try_into().expect("ten samples");
        for j in 0..8 {
            let e = (w[j] - 2.0 * w[j + 1] + w[j + 2]).abs();
            ok[j] &= e < f64::INFINITY;
            lanes[j] = if e > lanes[j] { e } else { lanes[j] };
        }
        k += 8;
    }
    while k + 1 < n {
        let e = (xs[k - 1] - 2.0 * xs[k] + xs[k + 1]).abs();
        ok[0] &= e < f64::INFINITY;
        lanes[0] = if e > lanes[0] { e } else { lanes[0] };
        k += 1;
    }
    if ok.iter().all(|&o| o) {
        lanes.iter().fold(0.0, |a, &x| if x > a { x } else { a })
    } else {
        f64::NAN
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // The block pass's cheap test against the exact one (a plain reference beside the fast
    // path): whenever the bound from the largest second difference says "inside", every
    // window of the block passes `Shaper::inside7`, and the peaks are the extremes of the
    // window centres. Random smooth and rough blocks near the limits.
    #[test]
    fn cheap_inside_implies_every_window_inside() {
        const H: usize = WINDOW - 1;
        let sh = Shaper {
            lo: -10.0,
            hi: 10.0,
            w: 0.5,
        };
        let (lo, hi) = (sh.lo + sh.w, sh.hi - sh.w);
        let mut rng = crate::rng::Rng::new(5);
        let (mut decided, mut refused) = (0, 0);
        for trial in 0..4000 {
            let b = 16 + (rng.uniform() * 100.0) as usize;
            let amp = 9.6 * rng.uniform();
            let w = 0.8 * rng.uniform().powi(3);
            let ph = 6.0 * rng.uniform();
            let rough = if trial % 5 == 0 {
                0.05 * rng.uniform()
            } else {
                0.0
            };
            let s: Vec<f64> = (0..b + H)
                .map(|i| amp * (w * i as f64 + ph).sin() + rough * (2.0 * rng.uniform() - 1.0))
                .collect();
            let xh: [f64; H] = s[..H].try_into().unwrap();
            let x = &s[H..];
            let mut head = [0.0; 2 * H];
            head[..H].copy_from_slice(&xh);
            head[H..].copy_from_slice(&x[..H]);
            let exact = (0..b).all(|j| {
                let win: &[f64; WINDOW] = s[j..j + WINDOW].try_into().unwrap();
                sh.inside7(win)
            });
            match cheap_inside(&head, x, lo, hi) {
                Some((pl, ph_)) => {
                    decided += 1;
                    assert!(exact, "trial {trial}: cheap said inside, a window is not");
                    let c = &s[3..b + 3];
                    let (ml, mh) = c
                        .iter()
                        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, z), &v| {
                            (a.min(v), z.max(v))
                        });
                    assert_eq!((pl, ph_), (ml, mh), "trial {trial}");
                }
                None => refused += u32::from(exact),
            }
        }
        // the bound is sufficient and rarely stricter than the exact test
        assert!(decided > 1000, "{decided}");
        println!("decided {decided}, exact-inside but refused {refused}");
        let mut bad = head_of(&[0.0; 40]);
        bad.1[20] = f64::NAN;
        assert!(cheap_inside(&bad.0, &bad.1, lo, hi).is_none());
    }

    fn head_of(s: &[f64]) -> ([f64; 2 * (WINDOW - 1)], Vec<f64>) {
        const H: usize = WINDOW - 1;
        let mut head = [0.0; 2 * H];
        head[..H].copy_from_slice(&s[..H]);
        head[H..].copy_from_slice(&s[H..2 * H]);
        (head, s[H..].to_vec())
    }

    // Stirling's differences bounded by the largest second difference (the derivation at
    // `shaper::REACH7_PER_E`), on random windows.
    #[test]
    fn reach7_is_bounded_by_second_differences() {
        let mut rng = crate::rng::Rng::new(9);
        for _ in 0..100_000 {
            let x: [f64; WINDOW] = std::array::from_fn(|_| 2.0 * rng.uniform() - 1.0);
            let e = (1..WINDOW - 1)
                .map(|t| (x[t + 1] - 2.0 * x[t] + x[t - 1]).abs())
                .fold(0.0, f64::max);
            assert!(reach7(&x) <= 0.2867 * e + 1e-15, "{x:?}");
        }
    }

    // The fast step against the plain reference step (railsong design: a plain reference
    // beside every fast path): same closed form, library special functions in the reference.
    #[test]
    fn solve_fast_matches_solve() {
        let mut worst: f64 = 0.0;
        let mut rng = crate::rng::Rng::new(7);
        for _ in 0..200_000 {
            let u = |r: &mut crate::rng::Rng| r.uniform();
            let b = 0.02 + 0.98 * u(&mut rng);
            let eps = 10f64.powf(-6.0 + 4.0 * u(&mut rng));
            let kh = 10f64.powf(-1.0 + 3.5 * u(&mut rng));
            let vov = 10f64.powf(-1.5 + 1.5 * u(&mut rng));
            let f = if u(&mut rng) < 0.3 { u(&mut rng) } else { 1.0 };
            let v0 = 24.0 * u(&mut rng) - 12.0;
            let scale = 10f64.powf(-6.0 + 7.0 * u(&mut rng));
            let p = b * v0 + scale * (2.0 * u(&mut rng) - 1.0);
            let pp = p + scale * (u(&mut rng) - 0.5);
            let lam = kh * b;
            let e_lam = (-lam).exp();
            let k = StepConsts {
                kh,
                lam,
                inv_lam: 1.0 / lam,
                e_lam,
                e_lin: (-kh * (b + eps)).exp(),
                weak: lam > 0.0 && e_lam * 0.53 < 1e-8,
            };
            let a = solve_fast(v0, p, pp, b, eps, f, vov, &k);
            let r = solve(v0, p, pp, b, eps, f, kh, vov);
            let d = (a - r).abs() / (1.0 + r.abs());
            assert!(
                d < 1e-11,
                "b {b} eps {eps} kh {kh} vov {vov} f {f} v0 {v0} p {p} pp {pp}: {a} vs {r}"
            );
            worst = worst.max(d);
        }
        println!("worst relative difference {worst:e}");
    }

    // The weak-step polynomials against the plain reference step, over the range they serve.
    #[test]
    fn weak_step_matches_solve() {
        let mut worst: f64 = 0.0;
        let mut rng = crate::rng::Rng::new(11);
        let mut used = 0;
        for _ in 0..2000 {
            let gbw = 10f64.powf(5.0 + 2.0 * rng.uniform());
            let h = 1.0 / (48_000.0 * [1.0, 2.0, 4.0, 8.0, 16.0][(rng.uniform() * 5.0) as usize]);
            let b = 0.02 + 0.98 * rng.uniform();
            let eps = 10f64.powf(-6.0 + 3.0 * rng.uniform());
            let vov = 10f64.powf(-1.5 + 1.5 * rng.uniform());
            let Some(ws) = WeakStep::with(gbw, b, eps, vov, h) else {
                continue;
            };
            used += 1;
            let kh = std::f64::consts::TAU * gbw * h;
            for _ in 0..100 {
                let v0 = 24.0 * rng.uniform() - 12.0;
                let z = 0.499 * rng.uniform();
                let d = z * vov * if rng.uniform() < 0.5 { -1.0 } else { 1.0 };
                let pp = b * v0 + d + 0.01 * vov * (rng.uniform() - 0.5);
                let p = 2.0 * (b * v0 + d) - pp;
                let zr = (0.5 * (p + pp) - b * v0) * ws.inv_vov;
                let t = zr * zr;
                let (t2, t4) = (t * t, t * t * t * t);
                let a = poly8(&ws.e, t, t2, t4) * v0
                    + poly8(&ws.a1, t, t2, t4) * p
                    + poly8(&ws.a0, t, t2, t4) * pp;
                let r = solve(v0, p, pp, b, eps, 1.0, kh, vov);
                let dmax = kh * (vov + eps * v0.abs());
                let a = v0 + (a - v0).clamp(-dmax, dmax);
                worst = worst.max((a - r).abs());
            }
        }
        println!("{used} stages, worst difference {worst:e} V");
        assert!(used > 100);
        assert!(worst < 1e-11, "worst difference {worst:e} V");
    }
}
