//! A/B comparison: level matching, the alternating file, the difference file, and the figures
//! of both sides with the wording of what moved.
//!
//! Conventions:
//! - B is matched to A by the RMS of the whole output, `gain = rms(A) / rms(B)`, or by
//!   integrated loudness per ITU-R BS.1770-4 ([`super::loudness`]),
//!   `gain = 10^((L_A - L_B) / 20)`; the gain in dB is `20 log10(gain)`.
//! - The alternating file plays A, B, A, B ... in segments of equal length, starting with A
//!   at t = 0. Each boundary at `k * segment` is the centre of a crossfade of `fade` samples
//!   (`fade/2` before, `fade/2` after). Inside it, at position `u = (n - start + 0.5) / fade`
//!   (0 < u < 1), the outgoing side has gain `(1 - u) / d` and the incoming side `u / d`,
//!   `d = sqrt((1 - u)^2 + u^2 + 2 rho u (1 - u))`, with `rho` the measured correlation of A
//!   and matched B (`sum(a b) / sqrt(sum(a^2) sum(b^2))`, DC included, held to 0..1). Two
//!   sides of equal RMS and correlation `rho` mix to a signal of the same RMS at every point
//!   of the fade (`E[(g a + h b)^2] = (g^2 + h^2 + 2 rho g h) E[a^2]`): correlated sides
//!   (`rho` = 1, the usual A/B of two versions of one circuit) get an equal-gain fade,
//!   `g_out + g_in = 1`, whose peak never passes the larger side's (an equal-power fade would
//!   add up to +3 dB at every switch); uncorrelated sides (`rho` = 0) an equal-power one,
//!   `g_out^2 + g_in^2 = 1`.
//! - The difference file is `A - gain * B`; its level is stated relative to A's RMS (dB below
//!   the signal) and in dBFS with the AES17 convention (a full-scale sine reads 0 dBFS, so
//!   `dBFS = 20 log10(sqrt 2 * rms / full_scale)`).
//! - Figures are those of each side's own render (B before matching: headroom and clipping
//!   belong to the circuit, not to the listening level).

use serde::Serialize;

use super::{db, rms, StudyError};
use crate::measure::OutputReport;

/// Which side of a comparison.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum Side {
    /// The first (reference) render.
    A,
    /// The second render (level-matched to A).
    B,
}

impl Side {
    /// "A" or "B".
    pub fn label(self) -> &'static str {
        match self {
            Side::A => "A",
            Side::B => "B",
        }
    }
}

/// Level-matching gain for B: `rms(A) / rms(B)`. `None` when B is silent or either RMS is
/// not finite.
pub fn matching_gain(a: &[f64], b: &[f64]) -> Option<f64> {
    let (ra, rb) = (rms(a), rms(b));
    let g = ra / rb;
    (rb > 0.0 && g.is_finite()).then_some(g)
}

/// How B is level-matched to A.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Matching {
    /// By the RMS of the whole output.
    Rms,
    /// By integrated loudness, ITU-R BS.1770-4 (K-weighted, gated).
    Loudness,
}

/// Level-matching gain for B by integrated loudness (BS.1770-4): `10^((L_A - L_B) / 20)`.
/// `None` when either is shorter than one 400 ms block or gated out as silence.
pub fn loudness_gain(a: &[f64], b: &[f64], rate: f64, full_scale: f64) -> Option<f64> {
    let scale = |x: &[f64]| -> Vec<f64> { x.iter().map(|v| v / full_scale).collect() };
    let la = super::loudness::integrated_lkfs(&scale(a), rate)?;
    let lb = super::loudness::integrated_lkfs(&scale(b), rate)?;
    let g = 10f64.powf((la - lb) / 20.0);
    g.is_finite().then_some(g)
}

/// Crossfade gains at position `u` (0..1) through a crossfade between two sides of equal
/// RMS and correlation `rho`: `(outgoing, incoming)` = `((1 - u) / d, u / d)`,
/// `d = sqrt((1 - u)^2 + u^2 + 2 rho u (1 - u))` (`rho` held to 0..1). Equal gain at
/// `rho = 1`, equal power at `rho = 0`.
pub fn crossfade_gains(u: f64, rho: f64) -> (f64, f64) {
    let u = u.clamp(0.0, 1.0);
    let rho = if rho.is_finite() {
        rho.clamp(0.0, 1.0)
    } else {
        0.0
    };
    let v = 1.0 - u;
    let d = (v * v + u * u + 2.0 * rho * u * v).sqrt();
    (v / d, u / d)
}

/// Correlation of two signals, `sum(a b) / sqrt(sum(a^2) sum(b^2))` (DC included; 0 when
/// either is silent), over the shorter length.
pub fn correlation(a: &[f64], b: &[f64]) -> f64 {
    let (mut ab, mut aa, mut bb) = (0.0, 0.0, 0.0);
    for (&x, &y) in a.iter().zip(b) {
        ab += x * y;
        aa += x * x;
        bb += y * y;
    }
    let r = ab / (aa * bb).sqrt();
    if r.is_finite() {
        r
    } else {
        0.0
    }
}

/// One segment of the alternating file.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Segment {
    /// Which side plays.
    pub side: Side,
    /// First frame (the boundary; the crossfade is centred on it).
    pub start: usize,
    /// One past the last frame.
    pub end: usize,
    /// Start time, s.
    pub start_s: f64,
    /// End time, s.
    pub end_s: f64,
}

/// The layout of an alternating A/B file.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Alternation {
    frames: usize,
    segment: usize,
    fade: usize,
    rate: f64,
}

impl Alternation {
    /// A layout of `frames` frames at `rate` Hz in segments of `segment_s` seconds with
    /// crossfades of `fade_s` seconds (rounded to an even number of frames, at most one
    /// segment long).
    pub fn new(frames: usize, rate: f64, segment_s: f64, fade_s: f64) -> Result<Self, StudyError> {
        if !(rate > 0.0 && rate.is_finite()) {
            return Err(StudyError::arg("rate", rate.to_string(), "a positive rate"));
        }
        if !(segment_s.is_finite() && segment_s > 0.0) {
            return Err(StudyError::arg(
                "--segment",
                format!("{segment_s} s"),
                "a positive length, e.g. 2s",
            ));
        }
        let segment = (segment_s * rate).round() as usize;
        if segment < 2 {
            return Err(StudyError::arg(
                "--segment",
                format!("{segment_s} s"),
                "at least two samples long",
            ));
        }
        if !(fade_s.is_finite() && fade_s >= 0.0) {
            return Err(StudyError::arg(
                "crossfade",
                format!("{fade_s} s"),
                "a length of 0 s or more",
            ));
        }
        let mut fade = ((fade_s * rate / 2.0).round() as usize) * 2;
        if fade > segment {
            fade = segment - segment % 2;
        }
        Ok(Alternation {
            frames,
            segment,
            fade,
            rate,
        })
    }

    /// Segment length, frames.
    pub fn segment_frames(&self) -> usize {
        self.segment
    }

    /// Crossfade length, frames (even).
    pub fn fade_frames(&self) -> usize {
        self.fade
    }

    /// The segments, in order (the key of the file).
    pub fn segments(&self) -> Vec<Segment> {
        let mut out = Vec::with_capacity(self.frames / self.segment + 1);
        let mut k = 0;
        while k * self.segment < self.frames {
            let start = k * self.segment;
            let end = (start + self.segment).min(self.frames);
            out.push(Segment {
                side: side_of(k),
                start,
                end,
                start_s: start as f64 / self.rate,
                end_s: end as f64 / self.rate,
            });
            k += 1;
        }
        out
    }

    /// Gains `(g_a, g_b)` at frame `n`, for sides of correlation `rho`.
    pub fn gains(&self, n: usize, rho: f64) -> (f64, f64) {
        let h = self.fade / 2;
        let j = (n + h) / self.segment;
        let b = j * self.segment;
        let (prev, next, g_prev, g_next) = if j >= 1 && self.fade > 0 && n < b - h + self.fade {
            let u = ((n + h - b) as f64 + 0.5) / self.fade as f64;
            let (o, i) = crossfade_gains(u, rho);
            (side_of(j - 1), side_of(j), o, i)
        } else {
            let s = side_of(n / self.segment);
            (s, s, 1.0, 0.0)
        };
        let mut ga = 0.0;
        let mut gb = 0.0;
        for (s, g) in [(prev, g_prev), (next, g_next)] {
            match s {
                Side::A => ga += g,
                Side::B => gb += g,
            }
        }
        (ga, gb)
    }

    /// Whether frame `n` lies inside a crossfade.
    pub fn in_fade(&self, n: usize) -> bool {
        let h = self.fade / 2;
        let j = (n + h) / self.segment;
        j >= 1 && self.fade > 0 && n < j * self.segment - h + self.fade
    }

    /// The alternating signal of `a` and (already matched) `b`, both `frames` long, with the
    /// crossfade law for their measured [`correlation`]; returns it with that correlation.
    pub fn render(&self, a: &[f64], b: &[f64]) -> Result<(Vec<f64>, f64), StudyError> {
        if a.len() != self.frames || b.len() != self.frames {
            return Err(StudyError::Mismatch(format!(
                "A has {} frames and B {}, the layout {}",
                a.len(),
                b.len(),
                self.frames
            )));
        }
        let rho = correlation(a, b).clamp(0.0, 1.0);
        let mix = (0..self.frames)
            .map(|n| {
                let (ga, gb) = self.gains(n, rho);
                ga * a[n] + gb * b[n]
            })
            .collect();
        Ok((mix, rho))
    }
}

fn side_of(k: usize) -> Side {
    if k.is_multiple_of(2) {
        Side::A
    } else {
        Side::B
    }
}

/// `A - gain * B`, sample by sample (over the shorter length).
pub fn difference(a: &[f64], b: &[f64], gain: f64) -> Vec<f64> {
    a.iter().zip(b).map(|(x, y)| x - gain * y).collect()
}

/// How far `diff` sits below `reference`, dB (positive = below; `inf` for a silent
/// difference).
pub fn db_below(diff: &[f64], reference: &[f64]) -> f64 {
    -db(rms(diff) / rms(reference))
}

/// RMS level in dBFS, AES17 convention (a full-scale sine reads 0 dBFS).
pub fn dbfs_rms(x: &[f64], full_scale: f64) -> f64 {
    db(std::f64::consts::SQRT_2 * rms(x) / full_scale)
}

/// Smallest change of a dB figure that gets a sentence, dB.
pub const DB_THRESHOLD: f64 = 0.1;
/// Smallest change of an event duration that gets a sentence, s.
pub const TIME_THRESHOLD: f64 = 0.001;
/// Smallest change of the DC offset that gets a sentence, V.
pub const DC_THRESHOLD: f64 = 0.001;

/// One figure of both sides.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FigureRow {
    /// Figure name (as in the JSON of `measure`; event names are summed over the stages
    /// upstream of the output).
    pub figure: &'static str,
    /// Unit for display.
    pub unit: &'static str,
    /// A's value.
    pub a: Option<f64>,
    /// B's value.
    pub b: Option<f64>,
    /// `b - a` when both exist.
    pub delta: Option<f64>,
}

/// Event duration of an output summed over its upstream stages.
pub fn event_total(r: &OutputReport, which: &str) -> f64 {
    r.events
        .values()
        .map(|e| match which {
            "clip_s" => e.clip_s,
            "slew_s" => e.slew_s,
            "cm_out_s" => e.cm_out_s,
            _ => e.reversed_s,
        })
        .sum()
}

/// The figures compared, with their units.
pub const COMPARED: [(&str, &str); 13] = [
    ("rms_v", "V"),
    ("peak_v", "V"),
    ("dc_v", "V"),
    ("crest_db", "dB"),
    ("headroom_pos_db", "dB"),
    ("headroom_neg_db", "dB"),
    ("thd_db", "dB"),
    ("thdn_db", "dB"),
    ("sinad_db", "dB"),
    ("clip_s", "s"),
    ("slew_s", "s"),
    ("cm_out_s", "s"),
    ("reversed_s", "s"),
];

fn pick(r: &OutputReport, name: &str) -> Option<f64> {
    let f = &r.figures;
    match name {
        "rms_v" => f.rms_v,
        "peak_v" => f.peak_v,
        "dc_v" => f.dc_v,
        "crest_db" => f.crest_db,
        "headroom_pos_db" => f.headroom_pos_db,
        "headroom_neg_db" => f.headroom_neg_db,
        "thd_db" => f.thd_db,
        "thdn_db" => f.thdn_db,
        "sinad_db" => f.sinad_db,
        other => Some(event_total(r, other)),
    }
}

/// Both sides' figures, in the order of [`COMPARED`].
pub fn figure_rows(a: &OutputReport, b: &OutputReport) -> Vec<FigureRow> {
    COMPARED
        .iter()
        .map(|&(figure, unit)| {
            let (x, y) = (pick(a, figure), pick(b, figure));
            let delta = match (x, y) {
                (Some(x), Some(y)) if x.is_finite() && y.is_finite() => Some(y - x),
                _ => None,
            };
            FigureRow {
                figure,
                unit,
                a: x,
                b: y,
                delta,
            }
        })
        .collect()
}

fn more_less(d: f64) -> &'static str {
    if d > 0.0 {
        "more"
    } else {
        "less"
    }
}

/// One plain-language sentence for each figure that moved beyond its threshold
/// ([`DB_THRESHOLD`], [`TIME_THRESHOLD`], [`DC_THRESHOLD`]; level by the ratio of RMS).
pub fn describe(rows: &[FigureRow]) -> Vec<String> {
    let mut out = Vec::new();
    for r in rows {
        let (Some(a), Some(b)) = (r.a, r.b) else {
            continue;
        };
        let Some(d) = r.delta else { continue };
        let s = match r.figure {
            "rms_v" if a > 0.0 && b > 0.0 => {
                let l = db(b / a);
                (l.abs() >= DB_THRESHOLD).then(|| {
                    format!(
                        "B is {:.1} dB {} than A before matching",
                        l.abs(),
                        if l > 0.0 { "louder" } else { "quieter" }
                    )
                })
            }
            "dc_v" => (d.abs() >= DC_THRESHOLD)
                .then(|| format!("B's DC offset moves by {:+.1} mV", d * 1e3)),
            "crest_db" => (d.abs() >= DB_THRESHOLD).then(|| {
                if d < 0.0 {
                    format!("B's crest factor is {:.1} dB lower (flatter peaks)", -d)
                } else {
                    format!("B's crest factor is {d:.1} dB higher")
                }
            }),
            "headroom_pos_db" | "headroom_neg_db" => {
                let side = if r.figure == "headroom_pos_db" {
                    "positive"
                } else {
                    "negative"
                };
                (d.abs() >= DB_THRESHOLD).then(|| {
                    if d < 0.0 {
                        format!("B reaches the {side} swing {:.1} dB sooner", -d)
                    } else {
                        format!("B has {d:.1} dB more headroom to the {side} swing")
                    }
                })
            }
            "thd_db" | "thdn_db" => {
                let what = if r.figure == "thd_db" { "THD" } else { "THD+N" };
                (d.abs() >= DB_THRESHOLD).then(|| {
                    if d > 0.0 {
                        format!("B adds {d:.1} dB of {what}")
                    } else {
                        format!("B has {:.1} dB less {what}", -d)
                    }
                })
            }
            "sinad_db" => (d.abs() >= DB_THRESHOLD).then(|| {
                format!(
                    "B's SINAD is {:.1} dB {}",
                    d.abs(),
                    if d > 0.0 { "higher" } else { "lower" }
                )
            }),
            "clip_s" => (d.abs() >= TIME_THRESHOLD)
                .then(|| format!("B clips for {:.2} s {}", d.abs(), more_less(d))),
            "slew_s" => (d.abs() >= TIME_THRESHOLD)
                .then(|| format!("B is slew-limited for {:.2} s {}", d.abs(), more_less(d))),
            "cm_out_s" => (d.abs() >= TIME_THRESHOLD).then(|| {
                format!(
                    "B spends {:.2} s {} outside the input range",
                    d.abs(),
                    more_less(d)
                )
            }),
            "reversed_s" => (d.abs() >= TIME_THRESHOLD).then(|| {
                format!(
                    "B's phase is reversed for {:.2} s {}",
                    d.abs(),
                    more_less(d)
                )
            }),
            _ => None,
        };
        out.extend(s);
    }
    out
}

/// The comparison of one output.
#[derive(Debug, Clone, Serialize)]
pub struct OutputComparison {
    /// Output name.
    pub output: String,
    /// How B was matched.
    pub matched_by: Matching,
    /// Gain applied to B, linear.
    pub gain: f64,
    /// Gain applied to B, dB.
    pub gain_db: f64,
    /// The difference sits this far below A's RMS, dB (`null` when the difference is exactly
    /// silent).
    pub difference_below_db: Option<f64>,
    /// RMS of the difference, dBFS (AES17 convention; `null` when silent).
    pub difference_dbfs: Option<f64>,
    /// Segments of the alternating file.
    pub segments: Vec<Segment>,
    /// Correlation of A and matched B (0..1) that chose the alternating file's crossfade
    /// law: 1 equal gain, 0 equal power.
    pub crossfade_correlation: f64,
    /// Figures side by side.
    pub figures: Vec<FigureRow>,
    /// Sentences for the figures that moved.
    pub changes: Vec<String>,
    /// B after matching.
    #[serde(skip)]
    pub b_matched: Vec<f64>,
    /// The alternating signal.
    #[serde(skip)]
    pub alternating: Vec<f64>,
    /// A minus matched B.
    #[serde(skip)]
    pub difference: Vec<f64>,
}

/// Compare one output: `a` and `b` are its samples, `ra` and `rb` its figures, `full_scale`
/// the calibration (V at 0 dBFS).
#[allow(clippy::too_many_arguments)]
pub fn compare_output(
    name: &str,
    a: &[f64],
    b: &[f64],
    ra: &OutputReport,
    rb: &OutputReport,
    layout: &Alternation,
    full_scale: f64,
    matching: Matching,
) -> Result<OutputComparison, StudyError> {
    let gain = match matching {
        Matching::Rms => matching_gain(a, b),
        Matching::Loudness => loudness_gain(a, b, layout.rate, full_scale),
    }
    .ok_or_else(|| StudyError::Silent {
        output: name.to_string(),
        which: "B".into(),
        what: match matching {
            Matching::Rms => "no level to match it to A".into(),
            Matching::Loudness => {
                "no loudness to match it to A (silent, or shorter than 400 ms)".into()
            }
        },
    })?;
    let b_matched: Vec<f64> = b.iter().map(|x| x * gain).collect();
    let (alternating, rho) = layout.render(a, &b_matched)?;
    let difference = difference(a, b, gain);
    let silent = rms(&difference) == 0.0;
    let figures = figure_rows(ra, rb);
    let changes = describe(&figures);
    Ok(OutputComparison {
        output: name.to_string(),
        matched_by: matching,
        gain,
        gain_db: db(gain),
        difference_below_db: (!silent).then(|| db_below(&difference, a)),
        difference_dbfs: (!silent).then(|| dbfs_rms(&difference, full_scale)),
        segments: layout.segments(),
        crossfade_correlation: rho,
        figures,
        changes,
        b_matched,
        alternating,
        difference,
    })
}
