//! SVG plots: well-formed, carrying the expected series, markers and labels at the right
//! positions. Each document is parsed with the checker in `plot_xml.rs` (XML 1.0
//! well-formedness rules) and its positions are checked against the axis mapping recomputed
//! here from `log10` / linear interpolation.

#[path = "plot_xml.rs"]
mod plot_xml;

use std::f64::consts::PI;

use plot_xml::{parse, Element};
use railsong::analysis::distortion::{thd_from_spectrum, AliasRule, Harmonics};
use railsong::analysis::sweep::level_at_thd;
use railsong::analysis::{Spectrum, Window};
use railsong::plot::*;

/// The axis mapping as stated by the document, recomputed here.
struct Map {
    log: bool,
    min: f64,
    max: f64,
    pmin: f64,
    pmax: f64,
}

impl Map {
    fn of(root: &Element, which: &str) -> Map {
        let a = root
            .by_class("axis")
            .into_iter()
            .find(|e| e.has_class(which))
            .unwrap_or_else(|| panic!("no {which} axis"));
        Map {
            log: a.attr("data-scale") == Some("log"),
            min: a.num("data-min"),
            max: a.num("data-max"),
            pmin: a.num("data-px-min"),
            pmax: a.num("data-px-max"),
        }
    }
    fn px(&self, v: f64) -> f64 {
        let t = if self.log {
            (v.log10() - self.min.log10()) / (self.max.log10() - self.min.log10())
        } else {
            (v - self.min) / (self.max - self.min)
        };
        self.pmin + t * (self.pmax - self.pmin)
    }
    fn value(&self, p: f64) -> f64 {
        let t = (p - self.pmin) / (self.pmax - self.pmin);
        if self.log {
            10f64.powf(self.min.log10() + t * (self.max.log10() - self.min.log10()))
        } else {
            self.min + t * (self.max - self.min)
        }
    }
}

/// Points of a path `d` written as `M x,y L x,y ...`.
fn path_points(e: &Element) -> Vec<(f64, f64)> {
    let d = e.attr("d").expect("path without d");
    d.split(['M', 'L'])
        .filter(|s| !s.is_empty())
        .map(|s| {
            let (x, y) = s.split_once(',').expect("x,y pair");
            (x.parse().unwrap(), y.parse().unwrap())
        })
        .collect()
}

fn ticks<'a>(root: &'a Element, which: &str) -> Vec<&'a Element> {
    root.by_class("axis")
        .into_iter()
        .find(|e| e.has_class(which))
        .unwrap()
        .by_class("tick")
}

/// Title, caption, axis labels: present and as given.
fn common_checks(root: &Element, kind: &str, title: &str, caption: &str) {
    assert_eq!(root.name, "svg");
    assert_eq!(root.attr("xmlns"), Some("http://www.w3.org/2000/svg"));
    assert_eq!(root.attr("data-plot"), Some(kind));
    assert_eq!(root.one("title").text, title);
    assert_eq!(root.one("caption").text, caption);
    assert_eq!(root.by_class("axis-label").len(), 2);
    for l in root.by_class("axis-label") {
        assert!(
            l.text.contains('(') && l.text.ends_with(')') || l.text == "Count",
            "{:?}",
            l.text
        );
    }
}

/// A coherent square wave from its Fourier series, `x(t) = (4/pi) sum_{n odd} sin(n w t) / n`
/// (any signals text), odd harmonics up to `max_order`, 1 V fundamental-series amplitude.
fn square_wave(rate: f64, n: usize, f0: f64, max_order: usize) -> Vec<f64> {
    (0..n)
        .map(|i| {
            let p = 2.0 * PI * f0 * i as f64 / rate;
            (1..=max_order)
                .step_by(2)
                .map(|k| 4.0 / PI * (k as f64 * p).sin() / k as f64)
                .sum()
        })
        .collect()
}

fn square_spectrum_plot(hide: Option<f64>) -> (String, Vec<HarmonicMark>, Spectrum) {
    let rate = 48_000.0;
    // 1 kHz in 48000 samples: 1000 whole cycles, a coherent capture (rectangular window).
    let x = square_wave(rate, 48_000, 1000.0, 15);
    let spec = Spectrum::compute(&x, rate, Window::Rectangular).unwrap();
    let thd = thd_from_spectrum(
        &spec,
        1000.0,
        Harmonics::UpTo(5),
        AliasRule::StopAtNyquist,
        true,
    )
    .unwrap();
    let marks = HarmonicMark::from_levels(&thd.harmonics);
    let (f, l) = spectrum_db(&spec, DbScale::Dbv).unwrap();
    let caption = settings_caption(&thd);
    let svg = spectrum_svg(&SpectrumPlot {
        title: "Square wave, 1 kHz",
        caption: &caption,
        freq_hz: &f,
        level_db: &l,
        unit: "dBV",
        band_hz: Some((20.0, 24_000.0)),
        harmonics: &marks,
        hide_below_dbc: hide,
        ..SpectrumPlot::default()
    })
    .unwrap();
    (svg, marks, spec)
}

#[test]
fn spectrum_square_wave_marks_the_odd_harmonics() {
    let (svg, _, _) = square_spectrum_plot(None);
    let root = parse(&svg).unwrap();
    common_checks(
        &root,
        "spectrum",
        "Square wave, 1 kHz",
        "window rectangular, FFT 48000, band 0 Hz - 24 kHz, coherent capture",
    );
    let s = root.one("spectrum");
    assert_eq!(s.name, "path");
    assert!(s.has_class("series"));
    assert_eq!(s.attr("data-series"), Some("spectrum"));
    let orders: Vec<usize> = root
        .by_class("harmonic")
        .iter()
        .map(|h| h.num("data-order") as usize)
        .collect();
    // Harmonics 2..=5 asked of the analysis; the even ones of a square wave are zero (only
    // rounding residue, at the noise floor), so only H3 and H5 stand above the floor and
    // are marked (issue 12: labels only above the noise floor).
    assert_eq!(orders, vec![3, 5]);
    assert_eq!(root.one("harmonics-hidden").num("data-count"), 2.0);
    for h in root.by_class("harmonic") {
        let n = h.num("data-order");
        let text = h.all_text();
        assert!(text.starts_with(&format!("H{n} ")), "{text}");
        // Square wave: b_n / b_1 = 1/n for odd n (Fourier series), so 20 log10(1/n) dBc.
        let expect = 20.0 * (1.0 / n).log10();
        assert!((h.num("data-dbc") - expect).abs() < 1e-9);
        assert_eq!(text, format!("H{n} {expect:.1} dBc"));
    }
}

// A sawtooth has every harmonic at 1/n of the fundamental (Fourier series, any signals
// text): H2..H10 of 1 kHz all stand above the floor and are marked, but on a log axis the
// upper ones crowd together; a label is drawn only where it clears the previous one, so no
// two labels overlap (each is a vertical line of text about 11 px wide).
#[test]
fn harmonic_labels_do_not_overlap() {
    let rate = 48_000.0;
    let x: Vec<f64> = (0..48_000)
        .map(|i| {
            let p = 2.0 * PI * 1000.0 * i as f64 / rate;
            (1..=15).map(|k| (k as f64 * p).sin() / k as f64).sum()
        })
        .collect();
    let spec = Spectrum::compute(&x, rate, Window::Rectangular).unwrap();
    let thd = thd_from_spectrum(
        &spec,
        1000.0,
        Harmonics::UpTo(10),
        AliasRule::StopAtNyquist,
        true,
    )
    .unwrap();
    let marks = HarmonicMark::from_levels(&thd.harmonics);
    let (f, l) = spectrum_db(&spec, DbScale::Dbv).unwrap();
    let svg = spectrum_svg(&SpectrumPlot {
        title: "Sawtooth, 1 kHz",
        caption: "",
        freq_hz: &f,
        level_db: &l,
        unit: "dBV",
        band_hz: Some((20.0, 24_000.0)),
        harmonics: &marks,
        ..SpectrumPlot::default()
    })
    .unwrap();
    let root = parse(&svg).unwrap();
    let hs = root.by_class("harmonic");
    assert_eq!(hs.len(), 9, "H2..H10 all above the floor");
    let labelled: Vec<f64> = hs
        .iter()
        .filter(|h| h.attr("data-labelled") == Some("true"))
        .map(|h| h.first("circle").unwrap().num("cx"))
        .collect();
    assert!(labelled.len() < hs.len(), "some crowded labels left out");
    assert!(labelled.len() >= 4);
    for w in labelled.windows(2) {
        assert!(w[1] - w[0] >= 11.0, "labels {w:?} overlap");
    }
    for h in &hs {
        let has_text = !h.all_text().is_empty();
        assert_eq!(has_text, h.attr("data-labelled") == Some("true"));
    }
}

#[test]
fn spectrum_hides_absent_harmonics_and_puts_markers_on_peaks() {
    let (svg, _, _) = square_spectrum_plot(Some(-200.0));
    let root = parse(&svg).unwrap();
    let harmonics = root.by_class("harmonic");
    let labels: Vec<String> = harmonics.iter().map(|h| h.all_text()).collect();
    let expect: Vec<String> = [3.0f64, 5.0]
        .iter()
        .map(|n| format!("H{n} {:.1} dBc", 20.0 * (1.0 / n).log10()))
        .collect();
    assert_eq!(labels, expect);
    assert_eq!(root.one("harmonics-hidden").num("data-count"), 2.0);
    // Marker on the peak: the bin level of harmonic n is (4 / (pi n)) / sqrt 2 V rms in dBV
    // (Fourier series of the square wave; amplitude-correct rectangular window on a bin).
    let (mx, my) = (Map::of(&root, "x"), Map::of(&root, "y"));
    for h in harmonics {
        let n = h.num("data-order");
        let dbv = 20.0 * (4.0 / (PI * n) / 2f64.sqrt()).log10();
        let c = h.first("circle").unwrap();
        assert!((c.num("cx") - mx.px(1000.0 * n)).abs() < 0.006);
        assert!((c.num("cy") - my.px(dbv)).abs() < 0.006);
    }
    // Noise floor: median of the bins, dashed; almost every bin is empty here, so the
    // median is far below the harmonics.
    let floor = root.one("noise-floor");
    assert_eq!(floor.attr("data-source"), Some("median"));
    assert!(floor.attr("stroke-dasharray").is_some());
    assert!(floor.num("data-db") < -150.0);
}

#[test]
fn log_frequency_ticks_sit_at_log10_positions() {
    let (svg, _, _) = square_spectrum_plot(None);
    let root = parse(&svg).unwrap();
    let m = Map::of(&root, "x");
    assert!(m.log);
    let t = ticks(&root, "x");
    let values: Vec<f64> = t.iter().map(|e| e.num("data-value")).collect();
    // Decades with 1-2-5 subdivisions (common practice for audio frequency axes).
    assert_eq!(
        values,
        vec![20.0, 50.0, 100.0, 200.0, 500.0, 1e3, 2e3, 5e3, 1e4, 2e4]
    );
    let labels: Vec<String> = t
        .iter()
        .map(|e| e.first("text").unwrap().text.clone())
        .collect();
    assert_eq!(
        labels,
        ["20", "50", "100", "200", "500", "1k", "2k", "5k", "10k", "20k"]
    );
    let xs: Vec<f64> = t
        .iter()
        .map(|e| e.first("line").unwrap().num("x1"))
        .collect();
    assert!(xs.windows(2).all(|w| w[1] > w[0]));
    // Position from log10, independently of the plot code: 20 Hz at the left edge, and
    // one decade = (px_max - px_min) / log10(24000 / 20).
    let decade = (m.pmax - m.pmin) / (24_000f64 / 20.0).log10();
    for (v, x) in values.iter().zip(&xs) {
        let expect = m.pmin + decade * (v / 20.0).log10();
        assert!(
            (x - expect).abs() < 0.006,
            "{v} Hz at {x}, expected {expect}"
        );
    }
    // Distance 100 -> 1000 Hz is one decade.
    assert!(((xs[5] - xs[2]) - decade).abs() < 0.011);
}

fn sine(rate: f64, n: usize, f: f64, a: f64) -> Vec<f64> {
    (0..n)
        .map(|i| a * (2.0 * PI * f * i as f64 / rate).sin())
        .collect()
}

#[test]
fn waveform_spans_levels_and_legend() {
    let rate = 48_000.0;
    let out = sine(rate, 960, 1000.0, 10.0); // 20 ms
    let inp = sine(rate, 960, 1000.0, 5.0);
    let spans = [
        EventSpan {
            kind: EventKind::Clipping,
            start_s: 2.0e-3,
            end_s: 3.5e-3,
        },
        EventSpan {
            kind: EventKind::Slewing,
            start_s: 5.0e-3,
            end_s: 5.25e-3,
        },
        // Starts before the window: drawn from the window's start.
        EventSpan {
            kind: EventKind::Reversed,
            start_s: 0.0,
            end_s: 1.5e-3,
        },
        // Entirely after the window: not drawn, not in the legend.
        EventSpan {
            kind: EventKind::OutOfInputRange,
            start_s: 15e-3,
            end_s: 16e-3,
        },
    ];
    let svg = waveform_svg(&WaveformPlot {
        title: "Output",
        caption: "20 ms at 48 kHz",
        output: Trace {
            samples: &out,
            rate,
            start_s: 0.0,
        },
        input: Some(Trace {
            samples: &inp,
            rate,
            start_s: 0.0,
        }),
        window_s: Some((1.0e-3, 11.0e-3)),
        rails: Some((-12.0, 12.0)),
        swing: Some((-10.5, 10.8)),
        common_mode: Some((-8.0, 10.0)),
        spans: &spans,
    })
    .unwrap();
    let root = parse(&svg).unwrap();
    common_checks(&root, "waveform", "Output", "20 ms at 48 kHz");
    let m = Map::of(&root, "x");
    assert_eq!((m.min, m.max), (1.0, 11.0)); // ms
    let rects = root.by_class("span");
    let got: Vec<(&str, f64, f64)> = rects
        .iter()
        .map(|r| {
            (
                r.attr("data-kind").unwrap(),
                r.num("x"),
                r.num("x") + r.num("width"),
            )
        })
        .collect();
    let expect = [
        ("clipping", 2.0, 3.5),
        ("slewing", 5.0, 5.25),
        ("reversed", 1.0, 1.5),
    ];
    assert_eq!(got.len(), expect.len());
    for ((k, x0, x1), (ek, a, b)) in got.iter().zip(expect) {
        assert_eq!(*k, ek);
        assert!((x0 - m.px(a)).abs() < 0.011, "{k} starts at {x0}");
        assert!((x1 - m.px(b)).abs() < 0.011, "{k} ends at {x1}");
    }
    let legend: Vec<String> = root
        .one("legend")
        .by_class("legend-item")
        .iter()
        .map(|e| {
            e.attr("data-kind")
                .or(e.attr("data-series"))
                .unwrap()
                .to_string()
        })
        .collect();
    assert_eq!(
        legend,
        ["output", "input", "clipping", "slewing", "reversed"]
    );
    // Level lines at their voltages, each labelled.
    let my = Map::of(&root, "y");
    let levels = root.by_class("level");
    let mut seen = Vec::new();
    for l in &levels {
        let v = l.num("data-v");
        assert!((l.num("y1") - my.px(v)).abs() < 0.006);
        let class = ["rail", "swing", "common-mode"]
            .into_iter()
            .find(|c| l.has_class(c))
            .unwrap();
        seen.push((class, l.attr("data-level").unwrap(), v));
    }
    assert_eq!(
        seen,
        [
            ("rail", "pos", 12.0),
            ("rail", "neg", -12.0),
            ("swing", "pos", 10.8),
            ("swing", "neg", -10.5),
            ("common-mode", "high", 10.0),
            ("common-mode", "low", -8.0)
        ]
    );
    let labels: Vec<String> = root
        .by_class("level-label")
        .iter()
        .map(|e| e.text.clone())
        .collect();
    assert_eq!(
        labels,
        [
            "rail 12 V",
            "rail -12 V",
            "swing limit 10.8 V",
            "swing limit -10.5 V",
            "CM high 10 V",
            "CM low -8 V"
        ]
    );
    // Both traces; the output's first point is the sample at 1 ms (index 48).
    let o = root.one("output");
    assert!(o.has_class("series"));
    assert!(root.one("input").has_class("series"));
    let p0 = path_points(o)[0];
    assert!((p0.0 - m.px(1.0)).abs() < 0.051);
    assert!((p0.1 - my.px(out[48])).abs() < 0.051);
    assert_eq!(o.num("data-source-points"), 481.0); // samples 48..=528
}

#[test]
fn transfer_reference_line_has_the_stated_slope() {
    // Inverting gain -2 (textbook: -Rf/Rin with 20k / 10k), swing limited at +/-10.5 V.
    let gain = -2.0;
    let input: Vec<f64> = (0..=4000)
        .map(|i| -8.0 + 16.0 * i as f64 / 4000.0)
        .collect();
    let output: Vec<f64> = input
        .iter()
        .map(|x| (gain * x).clamp(-10.5, 10.5))
        .collect();
    let svg = transfer_svg(&TransferPlot {
        title: "Inverting x2",
        caption: "slow ramp -8 V .. 8 V",
        input_v: &input,
        output_v: &output,
        gain,
        offset_v: 0.0,
        rails: Some((-12.0, 12.0)),
    })
    .unwrap();
    let root = parse(&svg).unwrap();
    common_checks(&root, "transfer", "Inverting x2", "slow ramp -8 V .. 8 V");
    let (mx, my) = (Map::of(&root, "x"), Map::of(&root, "y"));
    let r = root.one("reference");
    assert!(r.has_class("ideal"));
    assert_eq!(r.num("data-slope"), gain);
    assert!(r.attr("stroke-dasharray").is_some());
    let (x1, y1) = (mx.value(r.num("x1")), my.value(r.num("y1")));
    let (x2, y2) = (mx.value(r.num("x2")), my.value(r.num("y2")));
    let slope = (y2 - y1) / (x2 - x1);
    assert!((slope - gain).abs() < 1e-3, "slope {slope}");
    // Passes through the origin (offset 0): y at x = 0 on the drawn segment.
    let y0 = y1 + (0.0 - x1) * slope;
    assert!(y0.abs() < 0.01, "{y0}");
    // The curve follows the line inside the swing and leaves it outside.
    let pts = path_points(root.one("transfer"));
    let mut on_line = 0;
    let mut off_line = 0;
    for (px, py) in pts {
        let (x, y) = (mx.value(px), my.value(py));
        assert!(
            (y - (gain * x).clamp(-10.5, 10.5)).abs() < 0.05,
            "({x}, {y})"
        );
        if (y - gain * x).abs() < 0.05 {
            on_line += 1;
        } else if (y - gain * x).abs() > 1.0 {
            off_line += 1;
        }
    }
    assert!(on_line > 100 && off_line > 50, "{on_line} / {off_line}");
    assert_eq!(root.by_class("rail").len(), 2);
}

#[test]
fn sweep_log_log_crossing_and_threshold() {
    // THD growing as the square of level: thd = 0.01 % * (v / 1 V)^2; 1 % is reached at
    // v = (1 / 0.01)^(1/2) = 10 V (closed form). level_at_thd interpolates log-log, exact
    // for a power law.
    let pts: Vec<(f64, f64)> = (0..=20)
        .map(|i| {
            let v = 0.5 * 1.2f64.powi(i);
            (v, 0.01 * v * v)
        })
        .collect();
    let at = level_at_thd(&pts, 1.0).unwrap();
    assert!((at - 10.0).abs() < 1e-9);
    let other: Vec<(f64, f64)> = pts.iter().map(|&(v, t)| (v, t * 0.3)).collect();
    let series = [
        SweepSeries {
            name: "stage A <&>",
            points: &pts,
        },
        SweepSeries {
            name: "stage B",
            points: &other,
        },
    ];
    let crossings = [Crossing {
        x: at,
        y: 1.0,
        label: format!("1 % THD at {at:.1} Vpk"),
    }];
    let svg = sweep_svg(&SweepPlot {
        title: "THD against level",
        caption: "997 Hz, 20 Hz - 20 kHz",
        x: AxisSpec::log("Input level", "Vpk"),
        y: AxisSpec::log("THD", "%"),
        series: &series,
        crossings: &crossings,
        threshold: Some(Threshold {
            y: 1.0,
            label: "1 % THD".to_string(),
        }),
    })
    .unwrap();
    let root = parse(&svg).unwrap();
    common_checks(
        &root,
        "sweep",
        "THD against level",
        "997 Hz, 20 Hz - 20 kHz",
    );
    assert_eq!(root.one("axis-label x").text, "Input level (Vpk)");
    let (mx, my) = (Map::of(&root, "x"), Map::of(&root, "y"));
    assert!(mx.log && my.log);
    let names: Vec<&str> = root
        .by_class("sweep")
        .iter()
        .map(|e| e.attr("data-series").unwrap())
        .collect();
    assert_eq!(names, ["stage A <&>", "stage B"]);
    let c = root.one("crossing");
    assert_eq!(c.num("data-x"), at);
    let circle = c.first("circle").unwrap();
    assert!((circle.num("cx") - mx.px(10.0)).abs() < 0.006);
    assert!((circle.num("cy") - my.px(1.0)).abs() < 0.006);
    assert_eq!(c.all_text(), "1 % THD at 10.0 Vpk");
    let t = root.one("threshold");
    assert_eq!(t.num("data-y"), 1.0);
    assert!((t.num("y1") - my.px(1.0)).abs() < 0.006);
    // Log y ticks: 1-2-5 or decades, each at its log10 position, monotone upwards.
    let yt = ticks(&root, "y");
    let ys: Vec<f64> = yt
        .iter()
        .map(|e| e.first("line").unwrap().num("y1"))
        .collect();
    assert!(ys.windows(2).all(|w| w[1] < w[0]));
    for e in &yt {
        let v = e.num("data-value");
        let m = v / 10f64.powf(v.log10().floor());
        assert!([1.0, 2.0, 5.0].iter().any(|k| (m - k).abs() < 1e-9), "{v}");
        assert!((e.first("line").unwrap().num("y1") - my.px(v)).abs() < 0.006);
    }
    // Every series point drawn at its mapped position.
    let first = &root.by_class("series-group")[0];
    let dots = first.by_class("point");
    assert_eq!(dots.len(), pts.len());
    for (d, &(v, thd)) in dots.iter().zip(&pts) {
        assert!((d.num("cx") - mx.px(v)).abs() < 0.006);
        assert!((d.num("cy") - my.px(thd)).abs() < 0.006);
    }
    assert_eq!(root.one("legend").by_class("legend-item").len(), 2);
}

/// Deterministic pseudo-random values: 64-bit LCG (Knuth, TAOCP vol. 2, MMIX constants),
/// summed 12 at a time for a roughly normal spread (Irwin-Hall, variance 1).
fn spread(n: usize, seed: u64, centre: f64, sd: f64) -> Vec<f64> {
    let mut s = seed;
    let mut u = move || {
        s = s
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        (s >> 11) as f64 / (1u64 << 53) as f64
    };
    (0..n)
        .map(|_| centre + sd * ((0..12).map(|_| u()).sum::<f64>() - 6.0))
        .collect()
}

/// Quantile by Hyndman and Fan (1996) definition 7 (linear between order statistics).
fn quantile(sorted: &[f64], q: f64) -> f64 {
    let h = (sorted.len() - 1) as f64 * q;
    let lo = sorted[h.floor() as usize];
    let hi = sorted[h.ceil() as usize];
    lo + (h - h.floor()) * (hi - lo)
}

#[test]
fn histogram_freedman_diaconis_bins_and_stats() {
    let values = spread(1000, 7, 10_000.0, 50.0);
    let mut sorted = values.clone();
    sorted.sort_by(f64::total_cmp);
    let svg = histogram_svg(&HistogramPlot {
        title: "Gain spread, 1 % resistors",
        caption: "1000 runs, seed 7",
        values: &values,
        x: AxisSpec {
            format: TickFormat::Si,
            ..AxisSpec::linear("Feedback resistor", "ohm")
        },
        rule: BinRule::FreedmanDiaconis,
    })
    .unwrap();
    let root = parse(&svg).unwrap();
    common_checks(
        &root,
        "histogram",
        "Gain spread, 1 % resistors",
        "1000 runs, seed 7",
    );
    let bins = root.one("bins");
    assert_eq!(bins.attr("data-rule"), Some("freedman-diaconis"));
    // Freedman and Diaconis (1981): h = 2 IQR n^(-1/3).
    let iqr = quantile(&sorted, 0.75) - quantile(&sorted, 0.25);
    let h = 2.0 * iqr / 1000f64.cbrt();
    assert!((bins.num("data-width") - h).abs() < 1e-9 * h);
    let rects = bins.by_class("bin");
    let k = ((sorted[999] - sorted[0]) / h).ceil() as usize;
    assert_eq!(rects.len(), k);
    let total: f64 = rects.iter().map(|r| r.num("data-count")).sum();
    assert_eq!(total, 1000.0);
    // Each bin's count recomputed from its edges (last bin closed).
    for (i, r) in rects.iter().enumerate() {
        let (a, b) = (r.num("data-lo"), r.num("data-hi"));
        let n = sorted
            .iter()
            .filter(|&&v| v >= a && (v < b || (i == k - 1 && v <= b)))
            .count();
        assert_eq!(r.num("data-count") as usize, n, "bin {i}");
    }
    let stat = |s: &str| root.one(s).num("data-value");
    assert_eq!(stat("min"), sorted[0]);
    assert_eq!(stat("max"), sorted[999]);
    assert_eq!(stat("median"), 0.5 * (sorted[499] + sorted[500]));
    let mx = Map::of(&root, "x");
    assert!((root.one("median").num("x1") - mx.px(stat("median"))).abs() < 0.006);
    assert!(root.one("note").text.starts_with("Freedman-Diaconis rule"));
}

#[test]
fn histogram_sqrt_rule_and_fallback() {
    let values = spread(400, 3, 1.0, 0.01);
    let b = histogram_bins(&values, BinRule::Sqrt).unwrap();
    assert_eq!(b.counts.len(), 20); // ceil(sqrt(400)) bins
    assert_eq!(b.counts.iter().sum::<usize>(), 400);
    // Interquartile range 0 (most values equal): Freedman-Diaconis falls back to sqrt.
    let mut flat = vec![5.0; 97];
    flat.extend([1.0, 9.0, 9.5]);
    let b = histogram_bins(&flat, BinRule::FreedmanDiaconis).unwrap();
    assert_eq!(b.rule, BinRule::Sqrt);
    assert_eq!(b.counts.len(), 10);
    let svg = histogram_svg(&HistogramPlot {
        values: &flat,
        ..HistogramPlot::default()
    })
    .unwrap();
    assert_eq!(
        parse(&svg).unwrap().one("bins").attr("data-rule"),
        Some("sqrt")
    );
}

#[test]
fn long_inputs_are_decimated() {
    // One million samples of a 1 kHz sine plus a small 7 kHz tone, 20.8 s at 48 kHz.
    let rate = 48_000.0;
    let n = 1_000_000;
    let x: Vec<f64> = (0..n)
        .map(|i| {
            let t = i as f64 / rate;
            (2.0 * PI * 1000.0 * t).sin() + 0.1 * (2.0 * PI * 7000.0 * t).sin()
        })
        .collect();
    let svg = waveform_svg(&WaveformPlot {
        output: Trace {
            samples: &x,
            rate,
            start_s: 0.0,
        },
        input: Some(Trace {
            samples: &x,
            rate,
            start_s: 0.0,
        }),
        rails: Some((-12.0, 12.0)),
        ..WaveformPlot::default()
    })
    .unwrap();
    assert!(svg.len() < 300_000, "{} bytes", svg.len());
    let root = parse(&svg).unwrap();
    let o = root.one("output");
    assert_eq!(o.num("data-source-points"), n as f64);
    let width = WIDTH; // at most four points per pixel column
    assert!(o.num("data-points") <= 4.0 * width);
    assert_eq!(path_points(o).len() as f64, o.num("data-points"));
    // The envelope survives: the extremes of the path are the extremes of the signal.
    let my = Map::of(&root, "y");
    let top = path_points(o)
        .iter()
        .map(|p| p.1)
        .fold(f64::INFINITY, f64::min);
    let peak = x.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    assert!((my.value(top) - peak).abs() < 0.01);

    // A spectrum of 2^19 + 1 bins.
    let bins = (1 << 19) + 1;
    let f: Vec<f64> = (0..bins)
        .map(|k| k as f64 * 24_000.0 / (bins - 1) as f64)
        .collect();
    let l: Vec<f64> = (0..bins)
        .map(|k| -120.0 + 10.0 * ((k * 7919) % 13) as f64 / 13.0)
        .collect();
    let svg = spectrum_svg(&SpectrumPlot {
        freq_hz: &f,
        level_db: &l,
        unit: "dBFS",
        ..SpectrumPlot::default()
    })
    .unwrap();
    assert!(svg.len() < 300_000, "{} bytes", svg.len());
    let root = parse(&svg).unwrap();
    assert!(root.one("spectrum").num("data-points") <= 4.0 * width);
    assert_eq!(root.one("axis-label y").text, "Level (dBFS)");

    // A transfer curve of a million points.
    let y: Vec<f64> = x.iter().map(|v| 2.0 * v).collect();
    let svg = transfer_svg(&TransferPlot {
        input_v: &x,
        output_v: &y,
        gain: 2.0,
        ..TransferPlot::default()
    })
    .unwrap();
    assert!(svg.len() < 300_000, "{} bytes", svg.len());
}

#[test]
fn text_is_escaped() {
    let nasty = "R1 <10k> & \"C2\" 'x'";
    let rate = 48_000.0;
    let x = sine(rate, 480, 1000.0, 1.0);
    let docs = [
        waveform_svg(&WaveformPlot {
            title: nasty,
            caption: nasty,
            output: Trace {
                samples: &x,
                rate,
                start_s: 0.0,
            },
            ..WaveformPlot::default()
        })
        .unwrap(),
        sweep_svg(&SweepPlot {
            title: nasty,
            caption: nasty,
            x: AxisSpec::linear(nasty, "<V>"),
            y: AxisSpec::linear("THD", "%"),
            series: &[SweepSeries {
                name: nasty,
                points: &[(1.0, 1.0), (2.0, 3.0)],
            }],
            crossings: &[Crossing {
                x: 1.5,
                y: 2.0,
                label: nasty.to_string(),
            }],
            threshold: Some(Threshold {
                y: 2.0,
                label: nasty.to_string(),
            }),
        })
        .unwrap(),
        histogram_svg(&HistogramPlot {
            title: nasty,
            caption: nasty,
            values: &[1.0, 2.0, 2.5, 3.0],
            x: AxisSpec::linear(nasty, "&"),
            rule: BinRule::Sqrt,
        })
        .unwrap(),
    ];
    for d in &docs {
        let root = parse(d).expect("well-formed");
        assert_eq!(root.one("title").text, nasty);
        assert_eq!(root.one("caption").text, nasty);
        assert_eq!(root.first("title").unwrap().text, nasty);
        assert!(!d.contains("<10k>"));
    }
    let root = parse(&docs[1]).unwrap();
    assert_eq!(root.one("axis-label x").text, format!("{nasty} (<V>)"));
    assert_eq!(root.one("crossing").all_text(), nasty);
    assert_eq!(root.one("sweep").attr("data-series"), Some(nasty));
}

#[test]
fn bad_input_gives_typed_errors() {
    let e = spectrum_svg(&SpectrumPlot {
        freq_hz: &[100.0, 200.0],
        level_db: &[0.0],
        ..SpectrumPlot::default()
    })
    .unwrap_err();
    assert!(matches!(
        e,
        PlotError::LengthMismatch {
            what: "level_db",
            ..
        }
    ));
    assert!(e.to_string().starts_with("plot spectrum:"));
    let e = transfer_svg(&TransferPlot {
        input_v: &[0.0, 1.0],
        output_v: &[0.0, f64::NAN],
        gain: 1.0,
        ..TransferPlot::default()
    })
    .unwrap_err();
    assert!(matches!(
        e,
        PlotError::NotFinite {
            what: "output_v",
            index: 1,
            ..
        }
    ));
    let e = sweep_svg(&SweepPlot {
        x: AxisSpec::log("Level", "V"),
        y: AxisSpec::linear("THD", "%"),
        series: &[SweepSeries {
            name: "a",
            points: &[(0.0, 1.0)],
        }],
        ..SweepPlot::default()
    })
    .unwrap_err();
    assert!(matches!(
        e,
        PlotError::NotPositive {
            what: "series x",
            ..
        }
    ));
    let e = waveform_svg(&WaveformPlot::default()).unwrap_err();
    assert!(matches!(e, PlotError::Empty { what: "output", .. }));
    assert!(histogram_bins(&[], BinRule::Sqrt).is_err());
    let e = spectrum_svg(&SpectrumPlot {
        freq_hz: &[100.0, 200.0],
        level_db: &[0.0, -10.0],
        band_hz: Some((0.0, 1000.0)),
        ..SpectrumPlot::default()
    })
    .unwrap_err();
    assert!(matches!(
        e,
        PlotError::BadSetting {
            what: "band_hz",
            ..
        }
    ));
}

#[test]
fn output_is_deterministic() {
    let (a, _, _) = square_spectrum_plot(None);
    let (b, _, _) = square_spectrum_plot(None);
    assert_eq!(a, b);
}

#[test]
fn linear_ticks_use_1_2_5_steps_at_linear_positions() {
    let rate = 48_000.0;
    let x = sine(rate, 480, 1000.0, 7.3);
    let svg = waveform_svg(&WaveformPlot {
        output: Trace {
            samples: &x,
            rate,
            start_s: 0.0,
        },
        ..WaveformPlot::default()
    })
    .unwrap();
    let root = parse(&svg).unwrap();
    for axis in ["x", "y"] {
        let m = Map::of(&root, axis);
        let vals: Vec<f64> = ticks(&root, axis)
            .iter()
            .map(|t| t.num("data-value"))
            .collect();
        assert!(vals.len() >= 4 && vals.len() <= 12, "{axis}: {vals:?}");
        let step = vals[1] - vals[0];
        // Step is 1, 2 or 5 times a power of ten (common practice for axis ticks).
        let mant = step / 10f64.powf(step.log10().floor());
        assert!(
            [1.0, 2.0, 5.0].iter().any(|k| (mant - k).abs() < 1e-9),
            "{axis}: {step}"
        );
        for (i, t) in ticks(&root, axis).iter().enumerate() {
            let v = t.num("data-value");
            assert!((v - (vals[0] + i as f64 * step)).abs() < 1e-9 * step.max(1.0));
            let line = t.first("line").unwrap();
            let p = if axis == "x" {
                line.num("x1")
            } else {
                line.num("y1")
            };
            assert!((p - m.px(v)).abs() < 0.006);
        }
    }
    // Time axis: 10 ms record, 0 .. 479/48 ms.
    let m = Map::of(&root, "x");
    assert_eq!(m.min, 0.0);
    assert!((m.max - 479.0 / 48.0).abs() < 1e-12);
}

#[test]
fn checker_rejects_a_damaged_plot() {
    // The checker can fail on the plots themselves: cut or corrupted documents are refused.
    let (svg, _, _) = square_spectrum_plot(None);
    assert!(parse(&svg).is_ok());
    assert!(parse(&svg[..svg.len() - 8]).is_err());
    assert!(parse(&svg.replacen("</g>", "</path>", 1)).is_err());
    let escaped = waveform_svg(&WaveformPlot {
        title: "a < b",
        output: Trace {
            samples: &[0.0, 1.0],
            rate: 1.0,
            start_s: 0.0,
        },
        ..WaveformPlot::default()
    })
    .unwrap();
    assert!(parse(&escaped).is_ok());
    assert!(parse(&escaped.replacen("&lt;", "<", 1)).is_err());
}

mod arbitrary_input {
    use super::*;
    use proptest::prelude::*;

    proptest! {
        // Fixed seed and case count: the same 64 inputs on every run.
        #![proptest_config(ProptestConfig {
            cases: 64,
            failure_persistence: None,
            rng_seed: proptest::test_runner::RngSeed::Fixed(20_261_202),
            ..ProptestConfig::default()
        })]

        /// Any finite input gives a well-formed document or a typed error, never a panic.
        #[test]
        fn any_finite_input_gives_a_document(
            v in proptest::collection::vec(-1e12f64..1e12, 1..300),
            w in proptest::collection::vec(1e-9f64..1e9, 2..300),
        ) {
            let h = histogram_svg(&HistogramPlot { values: &v, ..HistogramPlot::default() }).unwrap();
            prop_assert!(parse(&h).is_ok());
            let pts: Vec<(f64, f64)> = w.iter().zip(&v).map(|(&a, &b)| (a, b.abs() + 1e-9)).collect();
            let s = sweep_svg(&SweepPlot {
                x: AxisSpec::log("x", "V"),
                y: AxisSpec::log("y", "%"),
                series: &[SweepSeries { name: "s", points: &pts }],
                ..SweepPlot::default()
            }).unwrap();
            prop_assert!(parse(&s).is_ok());
            let n = v.len().min(w.len());
            let t = transfer_svg(&TransferPlot {
                input_v: &v[..n],
                output_v: &w[..n],
                gain: 1.0,
                ..TransferPlot::default()
            });
            if n >= 2 {
                prop_assert!(parse(&t.unwrap()).is_ok());
            } else {
                prop_assert!(t.is_err());
            }
            let mut f = w.clone();
            f.sort_by(f64::total_cmp);
            let l: Vec<f64> = v.iter().cycle().take(f.len()).map(|x| x / 1e10).collect();
            if let Ok(sp) = spectrum_svg(&SpectrumPlot { freq_hz: &f, level_db: &l, unit: "dBV", ..SpectrumPlot::default() }) {
                prop_assert!(parse(&sp).is_ok());
            }
            let wf = waveform_svg(&WaveformPlot {
                output: Trace { samples: &v, rate: 48_000.0, start_s: 0.0 },
                ..WaveformPlot::default()
            }).unwrap();
            prop_assert!(parse(&wf).is_ok());
        }
    }
}

#[test]
fn spectrum_db_scales() {
    // 1 V peak sine on a bin centre (coherent, rectangular window): 1/sqrt 2 V rms, so
    // 20 log10(1/sqrt 2) = -3.01 dBV (0 dBV = 1 V rms); re a 2 V peak full scale,
    // 20 log10(1/2) = -6.02 dBFS (a full-scale sine is 0 dBFS) [D].
    let rate = 48_000.0;
    let x = sine(rate, 4800, 1000.0, 1.0);
    let spec = Spectrum::compute(&x, rate, Window::Rectangular).unwrap();
    let k = 100; // 1000 Hz / (48000 / 4800) Hz per bin
    let (f, dbv) = spectrum_db(&spec, DbScale::Dbv).unwrap();
    assert_eq!(f[k], 1000.0);
    assert!((dbv[k] - 20.0 * (1.0 / 2f64.sqrt()).log10()).abs() < 1e-9);
    let (_, dbfs) = spectrum_db(&spec, DbScale::Dbfs { full_scale_v: 2.0 }).unwrap();
    assert!((dbfs[k] - 20.0 * 0.5f64.log10()).abs() < 1e-9);
    // Empty bins are clamped to the floor, never -inf.
    assert!(dbv.iter().all(|d| d.is_finite() && *d >= FLOOR_DB));
    assert!(spectrum_db(&spec, DbScale::Dbfs { full_scale_v: 0.0 }).is_err());
    assert_eq!(DbScale::Dbv.unit(), "dBV");
}
