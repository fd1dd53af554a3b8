//! Test support for the engine tests: a small builder of `model::Patch` values and a
//! least-squares sine fit. (Compiled as its own, empty, test target too.)
#![allow(dead_code, clippy::needless_range_loop)]

use railsong::model::*;
use railsong::parts::{builtin, OpAmp};

/// Patch builder.
pub struct Pb {
    pub p: Patch,
}

pub fn part(name: &str) -> OpAmp {
    builtin(name).expect("built-in profile")
}

/// A custom linear part: given GBW and slew, no limits, infinite A0.
pub fn linear_part(gbw: f64, slew: f64) -> OpAmp {
    let mut p = part("ideal");
    p.name = "test-linear".into();
    p.gbw = gbw;
    p.slew = slew;
    p
}

impl Pb {
    pub fn new(rate: f64, oversample: usize, length: f64) -> Pb {
        Pb {
            p: Patch {
                title: "test".into(),
                rate,
                length,
                oversample,
                seed: 1,
                noise: false,
                temperature: 298.15,
                rails: Rails {
                    pos: 12.0,
                    neg: -12.0,
                },
                full_scale: 12.0,
                tolerances: Default::default(),
                sources: Vec::new(),
                stages: Vec::new(),
                outputs: Vec::new(),
            },
        }
    }

    pub fn rails(mut self, pos: f64, neg: f64) -> Pb {
        self.p.rails = Rails { pos, neg };
        self
    }

    fn src(&mut self, name: &str, wave: Wave, offset: f64) -> Node {
        self.p.sources.push(Source {
            name: name.into(),
            wave,
            offset,
            start: 0.0,
            stop: None,
            envelope: None,
            r: 0.0,
        });
        Node::Source(self.p.sources.len() - 1)
    }

    pub fn sine(&mut self, name: &str, freq: f64, amp: f64) -> Node {
        self.src(
            name,
            Wave::Sine {
                freq,
                amp,
                phase: 0.0,
            },
            0.0,
        )
    }

    pub fn sine_off(&mut self, name: &str, freq: f64, amp: f64, offset: f64) -> Node {
        self.src(
            name,
            Wave::Sine {
                freq,
                amp,
                phase: 0.0,
            },
            offset,
        )
    }

    pub fn dc(&mut self, name: &str, level: f64) -> Node {
        self.src(name, Wave::Dc { level }, 0.0)
    }

    pub fn wave(&mut self, name: &str, wave: Wave) -> Node {
        self.src(name, wave, 0.0)
    }

    fn stage(&mut self, name: &str, part: Option<OpAmp>, kind: StageKind) -> Node {
        self.p.stages.push(Stage {
            name: name.into(),
            part,
            kind,
        });
        Node::Stage(self.p.stages.len() - 1)
    }

    /// Inverting summer with resistive inputs and feedback.
    pub fn inv(&mut self, name: &str, part: &OpAmp, inputs: &[(Node, f64)], rf: f64) -> Node {
        let ins = inputs
            .iter()
            .map(|&(from, r)| SumInput { from, r, c: None })
            .collect();
        self.inv_full(name, part, ins, rf, None, None)
    }

    pub fn inv_full(
        &mut self,
        name: &str,
        part: &OpAmp,
        inputs: Vec<SumInput>,
        rf: f64,
        cf: Option<f64>,
        pot: Option<PotSetting>,
    ) -> Node {
        let single = inputs.len() == 1;
        self.stage(
            name,
            Some(part.clone()),
            StageKind::InvertingSum {
                inputs,
                feedback: Feedback { r: rf, c: cf, pot },
                reference: 0.0,
                single,
            },
        )
    }

    pub fn noninv(&mut self, name: &str, part: &OpAmp, from: Node, rf: f64, rg: f64) -> Node {
        self.stage(
            name,
            Some(part.clone()),
            StageKind::NonInverting {
                from,
                r_fb: rf,
                c_fb: None,
                r_g: rg,
                reference: 0.0,
            },
        )
    }

    pub fn follower(&mut self, name: &str, part: &OpAmp, from: Node) -> Node {
        self.stage(name, Some(part.clone()), StageKind::Follower { from })
    }

    pub fn atten(&mut self, name: &str, from: Node, pot: f64, taper: Taper, at: f64) -> Node {
        self.stage(
            name,
            None,
            StageKind::Attenuator {
                from,
                pot,
                taper,
                at,
            },
        )
    }

    pub fn out(&mut self, name: &str, from: Node, series: f64, load: Option<f64>) {
        self.p.outputs.push(Output {
            name: name.into(),
            from,
            inner: None,
            series,
            load,
            file: None,
        });
    }
}

/// Three-parameter least-squares sine fit at a known frequency (IEEE Std 1057 style):
/// returns (a, b, c) for `a sin(w n / fs) + b cos(w n / fs) + c`, with n the absolute sample
/// index of `x[0]` given by `n0`, and the rms of the residual.
pub fn fit(x: &[f64], n0: usize, freq: f64, rate: f64) -> (f64, f64, f64, f64) {
    let w = std::f64::consts::TAU * freq / rate;
    // normal equations, 3x3
    let mut m = [[0.0f64; 3]; 3];
    let mut r = [0.0f64; 3];
    for (i, &v) in x.iter().enumerate() {
        let t = (n0 + i) as f64 * w;
        let basis = [t.sin(), t.cos(), 1.0];
        for j in 0..3 {
            for k in 0..3 {
                m[j][k] += basis[j] * basis[k];
            }
            r[j] += basis[j] * v;
        }
    }
    // Gaussian elimination
    for c in 0..3 {
        let piv = m[c][c];
        for k in c..3 {
            m[c][k] /= piv;
        }
        r[c] /= piv;
        for row in 0..3 {
            if row != c {
                let f = m[row][c];
                for k in c..3 {
                    m[row][k] -= f * m[c][k];
                }
                r[row] -= f * r[c];
            }
        }
    }
    let (a, b, c) = (r[0], r[1], r[2]);
    let mut e2 = 0.0;
    for (i, &v) in x.iter().enumerate() {
        let t = (n0 + i) as f64 * w;
        let d = v - (a * t.sin() + b * t.cos() + c);
        e2 += d * d;
    }
    (a, b, c, (e2 / x.len() as f64).sqrt())
}

/// Render a patch and return its outputs.
pub fn render(p: &Patch) -> Vec<Vec<f64>> {
    let r = railsong::engine::run(p, &railsong::engine::RunOptions::default()).expect("runs");
    r.outputs.into_iter().map(|o| o.samples).collect()
}
