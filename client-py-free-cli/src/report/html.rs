//! The validation report: one self-contained HTML page with inline SVG (no scripts, no network),
//! drawn from a [`Validation`] and its [`Extras`]. Small hand-written SVG primitives keep the
//! page light and identical on every machine.

use crate::validate::{
    histogram, Extras, UnitFigures, UnitReport, Validation, RASTER_TRIALS, UNIT_FIGURES_MAX,
};
use auspex_modelling::calibrate::EvidenceRecord;
use std::fmt::Write;

/// Okabe & Ito's colour-blind-safe palette (yellow darkened to read on white), then two more.
const PALETTE: [&str; 10] = [
    "#0072B2", "#E69F00", "#009E73", "#D55E00", "#56B4E9", "#CC79A7", "#000000", "#A08C00",
    "#999999", "#882255",
];
const DECODER_COLOURS: [&str; 3] = ["#0072B2", "#E69F00", "#D55E00"];
/// Chance, thresholds and other reference lines.
const REFERENCE: &str = "#666";
/// Average advance of a character at the label font sizes (px), for fitting text to a width.
const CHAR_PX: f64 = 6.4;

/// `textLength` squeezing a text of `chars` characters into `avail` pixels when it would not fit.
fn fit_attr(chars: usize, avail: f64) -> String {
    if chars as f64 * CHAR_PX > avail {
        format!(r#" textLength="{avail:.0}" lengthAdjust="spacingAndGlyphs""#)
    } else {
        String::new()
    }
}

/// KS plots shown in the goodness-of-fit section (every unit's is in its own section).
const KS_PLOTS_SHOWN: usize = 8;

fn colour(i: usize) -> &'static str {
    PALETTE[i % PALETTE.len()]
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// A plotting area with data ranges mapped to pixels.
struct Plot {
    w: f64,
    h: f64,
    left: f64,
    right: f64,
    top: f64,
    bottom: f64,
    x: (f64, f64),
    y: (f64, f64),
    svg: String,
    xticks: bool,
    /// Data points drawn outside the axes (a figure that hides what it should show); the SVG
    /// then says how many (`data-outside`), which the report's tests refuse.
    outside: usize,
}

fn nice_ticks(lo: f64, hi: f64, n: usize) -> Vec<f64> {
    let span = (hi - lo).abs().max(1e-12);
    let raw = span / n.max(1) as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|s| span / s <= n as f64)
        .unwrap_or(10.0 * mag);
    let mut v = Vec::new();
    let mut t = (lo / step).ceil() * step;
    while t <= hi + 1e-9 * span {
        v.push(if t.abs() < 1e-12 { 0.0 } else { t });
        t += step;
    }
    v
}

fn fmt_tick(t: f64) -> String {
    if t.fract().abs() < 1e-9 {
        format!("{t:.0}")
    } else if (t * 10.0).fract().abs() < 1e-9 {
        format!("{t:.1}")
    } else {
        format!("{t:.2}")
    }
}

impl Plot {
    fn new(w: f64, h: f64, x: (f64, f64), y: (f64, f64)) -> Self {
        Plot {
            w,
            h,
            left: 46.0,
            right: 10.0,
            top: 22.0,
            bottom: 34.0,
            x,
            y,
            svg: String::new(),
            xticks: true,
            outside: 0,
        }
    }
    /// Counts (x, y) if it lies outside the axes.
    fn check(&mut self, x: f64, y: f64) {
        let inside = |v: f64, (a, b): (f64, f64)| {
            let tol = 1e-9 * (b - a).abs().max(1.0);
            v >= a.min(b) - tol && v <= a.max(b) + tol
        };
        if !(inside(x, self.x) && inside(y, self.y)) {
            self.outside += 1;
        }
    }
    fn sx(&self, x: f64) -> f64 {
        self.left
            + (x - self.x.0) / (self.x.1 - self.x.0).max(1e-12) * (self.w - self.left - self.right)
    }
    fn sy(&self, y: f64) -> f64 {
        self.h
            - self.bottom
            - (y - self.y.0) / (self.y.1 - self.y.0).max(1e-12) * (self.h - self.top - self.bottom)
    }
    fn axes(&mut self, title: &str, xlabel: &str, ylabel: &str) {
        let (x0, x1, y0, y1) = (
            self.sx(self.x.0),
            self.sx(self.x.1),
            self.sy(self.y.0),
            self.sy(self.y.1),
        );
        let _ = write!(
            self.svg,
            r##"<rect x="{x0:.1}" y="{y1:.1}" width="{:.1}" height="{:.1}" fill="#fbfbfd" stroke="#999" stroke-width="0.6"/>"##,
            x1 - x0,
            y0 - y1
        );
        for t in nice_ticks(self.x.0, self.x.1, 6)
            .into_iter()
            .filter(|_| self.xticks)
        {
            let px = self.sx(t);
            let _ = write!(
                self.svg,
                r##"<line x1="{px:.1}" y1="{y0:.1}" x2="{px:.1}" y2="{:.1}" stroke="#999"/><text x="{px:.1}" y="{:.1}" class="tk" text-anchor="middle">{}</text>"##,
                y0 + 4.0,
                y0 + 14.0,
                fmt_tick(t)
            );
        }
        for t in nice_ticks(self.y.0, self.y.1, 5) {
            let py = self.sy(t);
            let _ = write!(
                self.svg,
                r##"<line x1="{:.1}" y1="{py:.1}" x2="{x0:.1}" y2="{py:.1}" stroke="#999"/><line x1="{x0:.1}" y1="{py:.1}" x2="{x1:.1}" y2="{py:.1}" stroke="#eee"/><text x="{:.1}" y="{:.1}" class="tk" text-anchor="end">{}</text>"##,
                x0 - 4.0,
                x0 - 6.0,
                py + 3.5,
                fmt_tick(t)
            );
        }
        // Titles and labels longer than their room are squeezed to fit, never clipped.
        let _ = write!(
            self.svg,
            r##"<text x="{:.1}" y="14" class="tt"{}>{}</text><text x="{:.1}" y="{:.1}" class="lb" text-anchor="middle"{}>{}</text><text x="11" y="{:.1}" class="lb" text-anchor="middle" transform="rotate(-90 11 {:.1})">{}</text>"##,
            x0,
            fit_attr(title.chars().count() + 4, self.w - x0 - 4.0),
            esc(title),
            (x0 + x1) / 2.0,
            self.h - 4.0,
            fit_attr(xlabel.chars().count(), self.w - 8.0),
            esc(xlabel),
            (y0 + y1) / 2.0,
            (y0 + y1) / 2.0,
            esc(ylabel)
        );
    }
    fn line(&mut self, pts: &[(f64, f64)], col: &str, width: f64, dash: bool) {
        if pts.is_empty() {
            return;
        }
        for &(x, y) in pts {
            self.check(x, y);
        }
        let d: Vec<String> = pts
            .iter()
            .map(|(x, y)| format!("{:.1},{:.1}", self.sx(*x), self.sy(*y)))
            .collect();
        let _ = write!(
            self.svg,
            r##"<polyline fill="none" stroke="{col}" stroke-width="{width}"{} points="{}"/>"##,
            if dash {
                r#" stroke-dasharray="4 3""#
            } else {
                ""
            },
            d.join(" ")
        );
    }
    fn band(&mut self, xs: &[f64], lo: &[f64], hi: &[f64], col: &str) {
        let mut d: Vec<String> = xs
            .iter()
            .zip(hi)
            .map(|(x, y)| format!("{:.1},{:.1}", self.sx(*x), self.sy(*y)))
            .collect();
        d.extend(
            xs.iter()
                .zip(lo)
                .rev()
                .map(|(x, y)| format!("{:.1},{:.1}", self.sx(*x), self.sy(*y))),
        );
        let _ = write!(
            self.svg,
            r##"<polygon fill="{col}" fill-opacity="0.15" stroke="none" points="{}"/>"##,
            d.join(" ")
        );
    }
    fn bars(&mut self, edges: &[f64], heights: &[f64], col: &str, opacity: f64) {
        for (i, h) in heights.iter().enumerate() {
            let (x0, x1) = (self.sx(edges[i]), self.sx(edges[i + 1]));
            let (y0, y1) = (self.sy(0.0f64.max(self.y.0)), self.sy(*h));
            let _ = write!(
                self.svg,
                r##"<rect x="{x0:.1}" y="{y1:.1}" width="{:.1}" height="{:.1}" fill="{col}" fill-opacity="{opacity}"/>"##,
                (x1 - x0 - 0.5).max(0.5),
                (y0 - y1).max(0.0)
            );
        }
    }
    fn dot(&mut self, x: f64, y: f64, r: f64, col: &str, title: &str) {
        self.check(x, y);
        let _ = write!(
            self.svg,
            r##"<circle cx="{:.1}" cy="{:.1}" r="{r}" fill="{col}"><title>{}</title></circle>"##,
            self.sx(x),
            self.sy(y),
            esc(title)
        );
    }
    fn text(&mut self, x: f64, y: f64, s: &str, col: &str) {
        // Near the right edge the text ends at the point instead of starting there.
        let px = self.sx(x);
        let anchor = if px + s.chars().count() as f64 * CHAR_PX > self.w - 2.0 {
            "end"
        } else {
            "start"
        };
        let _ = write!(
            self.svg,
            // An inline style: the `tk` class's fill would win over a fill attribute.
            r##"<text x="{px:.1}" y="{:.1}" class="tk" style="fill:{col}" text-anchor="{anchor}">{}</text>"##,
            self.sy(y),
            esc(s)
        );
    }
    /// A line with a given dash pattern (e.g. "1 3" dotted).
    fn line_dashed(&mut self, pts: &[(f64, f64)], col: &str, width: f64, dash: &str) {
        let d: Vec<String> = pts
            .iter()
            .map(|(x, y)| format!("{:.1},{:.1}", self.sx(*x), self.sy(*y)))
            .collect();
        let _ = write!(
            self.svg,
            r##"<polyline fill="none" stroke="{col}" stroke-width="{width}" stroke-dasharray="{dash}" points="{}"/>"##,
            d.join(" ")
        );
    }
    /// A legend whose top-left corner is at (x, y) in data coordinates (kept off the data).
    fn legend_at(&mut self, items: &[(String, &str)], x: f64, y: f64) {
        let (mut py, px) = (self.sy(y) + 12.0, self.sx(x) + 4.0);
        for (label, col) in items {
            let _ = write!(
                self.svg,
                r##"<line x1="{px:.1}" y1="{:.1}" x2="{:.1}" y2="{:.1}" stroke="{col}" stroke-width="2.5"/><text x="{:.1}" y="{py:.1}" class="tk">{}</text>"##,
                py - 3.5,
                px + 16.0,
                py - 3.5,
                px + 20.0,
                esc(label)
            );
            py += 13.0;
        }
    }
    fn finish(self) -> String {
        format!(
            r#"<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" viewBox="0 0 {w} {h}"{}>{}</svg>"#,
            if self.outside > 0 {
                format!(r#" data-outside="{}""#, self.outside)
            } else {
                String::new()
            },
            self.svg,
            w = self.w,
            h = self.h
        )
    }
}

fn heatmap(title: &str, conf: &[Vec<u64>], names: &[String]) -> String {
    let n = names.len();
    let cell = (300.0 / n as f64).clamp(12.0, 36.0);
    let (left, top) = (60.0, 40.0);
    let size = cell * n as f64;
    let (w, h) = (left + size.max(330.0) + 20.0, top + size + 90.0);
    let mut s = format!(
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}"><text x="{left}" y="14" class="tt">{}</text>"#,
        esc(title)
    );
    for (i, row) in conf.iter().enumerate() {
        let tot: u64 = row.iter().sum::<u64>().max(1);
        for (j, &c) in row.iter().enumerate() {
            let p = c as f64 / tot as f64;
            let shade = (255.0 * (1.0 - p)).round() as u8;
            let fill = if i == j {
                format!("rgb({shade},{shade},255)")
            } else {
                format!("rgb(255,{shade},{shade})")
            };
            let _ = write!(
                s,
                r##"<rect x="{:.1}" y="{:.1}" width="{cell:.1}" height="{cell:.1}" fill="{fill}" stroke="#fff"><title>presented {} → decoded {}: {c} of {tot} ({:.0}%)</title></rect>"##,
                left + j as f64 * cell,
                top + i as f64 * cell,
                esc(&names[i]),
                esc(&names[j]),
                100.0 * p
            );
            if cell >= 22.0 && c > 0 {
                // Light text on dark cells, by the cell's luminance (Rec. 709 weights); an
                // inline style, since the `tk` class's fill would win over a fill attribute.
                let v = shade as f64 / 255.0;
                let lum = if i == j {
                    0.2126 * v + 0.7152 * v + 0.0722
                } else {
                    0.2126 + 0.7152 * v + 0.0722 * v
                };
                let ink = if lum < 0.55 { "#fff" } else { "#222" };
                let _ = write!(
                    s,
                    r##"<text x="{:.1}" y="{:.1}" class="tk" text-anchor="middle" style="fill:{ink}">{c}</text>"##,
                    left + (j as f64 + 0.5) * cell,
                    top + (i as f64 + 0.6) * cell
                );
            }
        }
        let _ = write!(
            s,
            r##"<text x="{:.1}" y="{:.1}" class="tk" text-anchor="end">{}</text>"##,
            left - 4.0,
            top + (i as f64 + 0.65) * cell,
            esc(&names[i])
        );
        let _ = write!(
            s,
            r##"<text x="{:.1}" y="{:.1}" class="tk" text-anchor="middle">{}</text>"##,
            left + (i as f64 + 0.5) * cell,
            top - 4.0,
            esc(&names[i])
        );
    }
    let _ = write!(
        s,
        r##"<text x="{:.1}" y="{:.1}" class="lb" text-anchor="middle">rows: presented · columns: decoded</text>"##,
        left + size / 2.0,
        top + size + 18.0
    );
    // Colour scale: share of the presented row, right (diagonal, blue) and wrong (red).
    let (sx, sy, sw) = (left, top + size + 30.0, size.min(200.0));
    for k in 0..20 {
        let p = k as f64 / 19.0;
        let shade = (255.0 * (1.0 - p)).round() as u8;
        let _ = write!(
            s,
            r##"<rect x="{:.1}" y="{sy:.1}" width="{:.1}" height="8" fill="rgb({shade},{shade},255)"/><rect x="{:.1}" y="{:.1}" width="{:.1}" height="8" fill="rgb(255,{shade},{shade})"/>"##,
            sx + p * (sw - sw / 20.0),
            sw / 20.0 + 0.5,
            sx + p * (sw - sw / 20.0),
            sy + 9.0,
            sw / 20.0 + 0.5
        );
    }
    let _ = write!(
        s,
        r##"<text x="{:.1}" y="{:.1}" class="tk">0</text><text x="{:.1}" y="{:.1}" class="tk" text-anchor="end">100% of the row</text><text x="{:.1}" y="{:.1}" class="tk">colour: share of the presented row (blue: right, red: wrong)</text></svg>"##,
        sx,
        sy + 28.0,
        sx + sw,
        sy + 28.0,
        sx,
        sy + 41.0
    );
    s
}

/// Legend entries: each decoder in its colour.
fn decoder_legend(v: &Validation) -> Vec<(String, &'static str)> {
    v.decoders
        .iter()
        .enumerate()
        .map(|(d, dr)| (dr.decoder.clone(), DECODER_COLOURS[d % 3]))
        .collect()
}

fn accuracy_plot(v: &Validation) -> String {
    let mut p = Plot::new(620.0, 320.0, (0.0, v.window_ms), (0.0, 1.0));
    p.axes(
        "Accuracy against time since onset (held-out trials, 95% Clopper–Pearson bands)",
        "ms after onset",
        "accuracy",
    );
    p.line(
        &[(0.0, v.chance), (v.window_ms, v.chance)],
        REFERENCE,
        1.2,
        true,
    );
    p.text(v.window_ms * 0.01, v.chance + 0.02, "chance", REFERENCE);
    let mut legend = Vec::new();
    // Drawn in reverse so the default decoder ends on top; the second one dashed, so identical
    // curves still show both.
    for (d, dr) in v.decoders.iter().enumerate().rev() {
        let col = DECODER_COLOURS[d % 3];
        if dr.decoder == "count-only" {
            // It decides only at the window end: one point, not a curve along chance.
            let c = &dr.accuracy_end;
            p.line(&[(c.t_ms, c.lo), (c.t_ms, c.hi)], col, 1.5, false);
            p.dot(
                c.t_ms,
                c.accuracy,
                4.0,
                col,
                &format!("count-only at the window end: {:.1}%", 100.0 * c.accuracy),
            );
            legend.push((format!("{} (window end only)", dr.decoder), col));
            continue;
        }
        let xs: Vec<f64> = dr.curve.iter().map(|c| c.t_ms).collect();
        let lo: Vec<f64> = dr.curve.iter().map(|c| c.lo).collect();
        let hi: Vec<f64> = dr.curve.iter().map(|c| c.hi).collect();
        p.band(&xs, &lo, &hi, col);
        let pts: Vec<(f64, f64)> = dr.curve.iter().map(|c| (c.t_ms, c.accuracy)).collect();
        p.line(&pts, col, 2.0, d == 1);
        legend.push((
            format!("{}{}", dr.decoder, if d == 1 { " (dashed)" } else { "" }),
            col,
        ));
        if let Some(t) = dr.earliest_reliable_ms {
            let y = dr.curve[((t / v.bin_ms) as usize)
                .saturating_sub(1)
                .min(dr.curve.len() - 1)]
            .accuracy;
            p.dot(
                t,
                y,
                4.0,
                DECODER_COLOURS[d % 3],
                &format!("{}: reliably above chance from {t:.0} ms", dr.decoder),
            );
        }
    }
    legend.reverse();
    legend.push(("bands: 95% intervals".into(), "#ccc"));
    p.legend_at(&legend, v.window_ms * 0.55, 0.55);
    p.finish()
}

fn tradeoff_plot(v: &Validation) -> String {
    // A little room past the window end and 100%: the count-only decoder's points sit there,
    // and a dot on the border reads as cut.
    let mut p = Plot::new(420.0, 320.0, (0.0, v.window_ms * 1.04), (0.0, 1.03));
    p.axes(
        "Decisions: accuracy against mean decision time",
        "mean decision time (ms)",
        "decision accuracy",
    );
    for (d, dr) in v.decoders.iter().enumerate() {
        let pts: Vec<(f64, f64)> = dr
            .tradeoff
            .iter()
            .map(|t| (t.mean_time_ms, t.accuracy))
            .collect();
        p.line(&pts, DECODER_COLOURS[d % 3], 1.5, false);
        for t in &dr.tradeoff {
            p.dot(
                t.mean_time_ms,
                t.accuracy,
                3.0,
                DECODER_COLOURS[d % 3],
                &format!(
                    "{} θ={}: {:.1}% [{:.1}, {:.1}] at {:.1} ms mean, {:.0}% before the window end",
                    dr.decoder,
                    t.threshold,
                    100.0 * t.accuracy,
                    100.0 * t.lo,
                    100.0 * t.hi,
                    t.mean_time_ms,
                    100.0 * t.early_share
                ),
            );
        }
    }
    p.line(
        &[(0.0, v.chance), (v.window_ms, v.chance)],
        REFERENCE,
        1.2,
        true,
    );
    p.text(v.window_ms * 0.01, v.chance + 0.02, "chance", REFERENCE);
    p.legend_at(&decoder_legend(v), v.window_ms * 0.5, 0.5);
    p.finish()
}

fn calibration_plot(v: &Validation) -> String {
    let sets = &v.calibration.reliability;
    // Bins of equal counts, and the axes zoomed to where they lie (with the diagonal): the
    // decisions' confidences crowd above θ, and fixed bins of 0.1 drew one point in a corner.
    let lowest = sets
        .iter()
        .flat_map(|s| s.equal_mass.iter())
        .map(|b| b.lo.min(b.confidence))
        .fold(1.0f64, f64::min);
    let from = ((lowest - 0.02) * 20.0).floor().max(0.0) / 20.0;
    let mut p = Plot::new(460.0, 360.0, (from, 1.0), (from, 1.0));
    p.axes(
        "Reliability: stated confidence against held-out accuracy",
        "top posterior (10 bins of equal counts)",
        "accuracy (95% interval)",
    );
    p.line(&[(from, from), (1.0, 1.0)], REFERENCE, 1.0, true);
    p.text(
        from + 0.62 * (1.0 - from),
        from + 0.06 * (1.0 - from),
        "dashed: perfect calibration",
        REFERENCE,
    );
    let shown: Vec<usize> = [0, sets.len().saturating_sub(1)]
        .into_iter()
        .filter(|&i| i < sets.len())
        .collect::<std::collections::BTreeSet<_>>()
        .into_iter()
        .collect();
    let mut legend = Vec::new();
    for (k, &i) in shown.iter().enumerate() {
        let set = &sets[i];
        let col = DECODER_COLOURS[k % 3];
        let bins: Vec<_> = set.equal_mass.iter().collect();
        let pts: Vec<(f64, f64)> = bins.iter().map(|b| (b.confidence, b.accuracy)).collect();
        p.line(&pts, col, 1.5, false);
        for b in bins {
            p.line(
                &[(b.confidence, b.lo), (b.confidence, b.hi)],
                col,
                1.0,
                false,
            );
            p.dot(
                b.confidence,
                b.accuracy,
                3.0,
                col,
                &format!(
                    "{}: confidence {:.3}, accuracy {:.1}% [{:.1}, {:.1}] of {} trials",
                    set.when,
                    b.confidence,
                    100.0 * b.accuracy,
                    100.0 * b.lo,
                    100.0 * b.hi,
                    b.n
                ),
            );
        }
        legend.push((format!("{} (ECE {:.3})", set.when, set.ece), col));
    }
    p.legend_at(&legend, from + 0.02 * (1.0 - from), 0.98);
    p.finish()
}

const METHOD_COLOURS: [&str; 4] = ["#999999", "#0072B2", "#E69F00", "#009E73"];

/// Realised held-out accuracy against the promise, per recalibration method.
fn promise_plot(v: &Validation) -> String {
    // Down to the lowest accuracy shown (a weak model's sit below 0.78, and must be seen), and
    // a little past θ = 0.999, where the methods' points stand side by side.
    let ylow = v
        .calibration
        .methods
        .iter()
        .flat_map(|m| m.record.iter())
        .filter(|e| e.threshold >= 0.8 && e.early > 0)
        .map(|e| e.early_accuracy().0 - 0.02)
        .fold(0.78f64, f64::min)
        .max(0.0);
    let ylow = (ylow * 50.0).floor() / 50.0;
    let mut p = Plot::new(460.0, 360.0, (0.78, 1.006), (ylow, 1.0));
    p.axes(
        "Promise kept? threshold against held-out accuracy",
        "threshold θ (the promised accuracy)",
        "accuracy of threshold decisions (95% interval)",
    );
    p.line(&[(0.78, 0.78), (1.0, 1.0)], REFERENCE, 1.0, true);
    let methods = &v.calibration.methods;
    let mut legend = Vec::new();
    for (m, mr) in methods.iter().enumerate() {
        let col = METHOD_COLOURS[m % 4];
        // Side by side so intervals at the same threshold do not hide each other.
        let dx = (m as f64 - (methods.len() as f64 - 1.0) / 2.0) * 0.0025;
        let pts: Vec<&auspex_engine::calibration::ThresholdEvidence> =
            mr.record.iter().filter(|e| e.threshold >= 0.8).collect();
        let pts: Vec<_> = pts.into_iter().filter(|e| e.early > 0).collect();
        let line: Vec<(f64, f64)> = pts
            .iter()
            .map(|e| (e.threshold + dx, e.early_accuracy().0))
            .collect();
        p.line(&line, col, 1.5, false);
        for e in pts {
            let (acc, lo, hi) = e.early_accuracy();
            p.line(
                &[(e.threshold + dx, lo.max(ylow)), (e.threshold + dx, hi)],
                col,
                1.0,
                false,
            );
            p.dot(
                e.threshold + dx,
                acc,
                3.0,
                col,
                &format!(
                    "{}: θ = {}: {}/{} threshold decisions right = {:.1}% [{:.1}, {:.1}] ({} of {} trials decided by the threshold), median decision {:.0} ms",
                    mr.method,
                    e.threshold,
                    e.early_correct,
                    e.early,
                    100.0 * acc,
                    100.0 * lo,
                    100.0 * hi,
                    e.early,
                    e.trials,
                    e.median_decision_ms
                ),
            );
        }
        legend.push((
            format!(
                "{}: {}/{} kept, {}/{} ≥ θ",
                if mr.method == "none" {
                    "raw"
                } else {
                    &mr.method
                },
                mr.kept.0,
                mr.kept.1,
                mr.met.0,
                mr.met.1
            ),
            col,
        ));
    }
    legend.push(("dashed: accuracy = promise".to_string(), REFERENCE));
    p.legend_at(&legend, 0.855, 0.84);
    p.finish()
}

/// Accuracy against median decision time per recalibration method (the price of a kept promise).
fn promise_time_plot(v: &Validation) -> String {
    let methods = &v.calibration.methods;
    // Up to θ = 0.99: beyond it decisions drift to the window end and squash the rest.
    let shown = |e: &&auspex_engine::calibration::ThresholdEvidence| {
        e.threshold >= 0.8 && e.threshold <= 0.99 + 1e-9
    };
    let tmax = methods
        .iter()
        .flat_map(|m| m.record.iter().filter(shown).map(|e| e.median_decision_ms))
        .fold(0.0f64, f64::max)
        .max(10.0);
    // Down to the lowest accuracy shown: a weak model's lie below 0.78 and must be seen.
    let ylow = methods
        .iter()
        .flat_map(|m| m.record.iter().filter(shown).map(|e| e.accuracy() - 0.02))
        .fold(0.78f64, f64::min)
        .max(0.0);
    let ylow = (ylow * 50.0).floor() / 50.0;
    let mut p = Plot::new(460.0, 360.0, (0.0, tmax * 1.05), (ylow, 1.0));
    p.axes(
        "What a kept promise costs (θ 0.8–0.99)",
        "median decision time (ms)",
        "held-out accuracy of all decisions",
    );
    let mut legend = Vec::new();
    for (m, mr) in methods.iter().enumerate() {
        let col = METHOD_COLOURS[m % 4];
        let pts: Vec<(f64, f64)> = mr
            .record
            .iter()
            .filter(shown)
            .map(|e| (e.median_decision_ms, e.accuracy()))
            .collect();
        p.line(&pts, col, 1.5, m == 0);
        for e in mr.record.iter().filter(shown) {
            p.dot(
                e.median_decision_ms,
                e.accuracy(),
                2.5,
                col,
                &format!(
                    "{}: θ = {}: {:.1}% at {:.0} ms",
                    mr.method,
                    e.threshold,
                    100.0 * e.accuracy(),
                    e.median_decision_ms
                ),
            );
        }
        legend.push((
            if mr.method == "none" {
                "raw posterior (dashed)".to_string()
            } else {
                mr.method.clone()
            },
            col,
        ));
    }
    p.legend_at(&legend, tmax * 0.55, 0.86);
    p.finish()
}

fn learning_plots(v: &Validation) -> String {
    let lc = &v.learning_curve;
    let xmax = lc
        .last()
        .map(|p| p.trials_per_stimulus as f64)
        .unwrap_or(1.0);
    let xs: Vec<f64> = lc.iter().map(|p| p.trials_per_stimulus as f64).collect();
    let mut a = Plot::new(460.0, 300.0, (0.0, xmax), (0.0, 1.0));
    a.axes(
        "Held-out accuracy at the window end (95% interval)",
        "training trials per stimulus",
        "accuracy",
    );
    let lo: Vec<f64> = lc.iter().map(|p| p.lo).collect();
    let hi: Vec<f64> = lc.iter().map(|p| p.hi).collect();
    a.band(&xs, &lo, &hi, DECODER_COLOURS[0]);
    let pts: Vec<(f64, f64)> = lc
        .iter()
        .map(|p| (p.trials_per_stimulus as f64, p.accuracy))
        .collect();
    a.line(&pts, DECODER_COLOURS[0], 2.0, false);
    for p in lc {
        a.dot(
            p.trials_per_stimulus as f64,
            p.accuracy,
            3.0,
            DECODER_COLOURS[0],
            &format!(
                "{} trials per stimulus: {:.1}% [{:.1}, {:.1}]",
                p.trials_per_stimulus,
                100.0 * p.accuracy,
                100.0 * p.lo,
                100.0 * p.hi
            ),
        );
    }
    a.line(&[(0.0, v.chance), (xmax, v.chance)], REFERENCE, 1.2, true);
    a.text(xmax * 0.02, v.chance + 0.02, "chance", REFERENCE);
    let top = lc
        .iter()
        .map(|p| p.info_bits + 1.96 * p.info_se_bits)
        .fold((v.stimuli.len() as f64).log2() * 0.25, f64::max)
        * 1.1;
    let mut b = Plot::new(460.0, 300.0, (0.0, xmax), (0.0, top));
    b.axes(
        "Held-out information (± 1.96 s.e.)",
        "training trials per stimulus",
        "bits",
    );
    let lo: Vec<f64> = lc
        .iter()
        .map(|p| (p.info_bits - 1.96 * p.info_se_bits).max(0.0))
        .collect();
    let hi: Vec<f64> = lc
        .iter()
        .map(|p| p.info_bits + 1.96 * p.info_se_bits)
        .collect();
    b.band(&xs, &lo, &hi, DECODER_COLOURS[0]);
    let pts: Vec<(f64, f64)> = lc
        .iter()
        .map(|p| (p.trials_per_stimulus as f64, p.info_bits))
        .collect();
    b.line(&pts, DECODER_COLOURS[0], 2.0, false);
    // A marker per measured size, as on the accuracy curve: the line joins measurements.
    for (lp, &(x, y)) in lc.iter().zip(&pts) {
        b.dot(
            x,
            y,
            3.0,
            DECODER_COLOURS[0],
            &format!(
                "{} trials per stimulus: {:.3} ± {:.3} bits",
                lp.trials_per_stimulus,
                lp.info_bits,
                1.96 * lp.info_se_bits
            ),
        );
    }
    a.finish() + &b.finish()
}

fn decision_time_plot(v: &Validation) -> String {
    let d = &v.decoders[0];
    let (edges, h) = histogram(&d.decision_times_ms, 0.0, v.window_ms, 50);
    let top = h.iter().cloned().fold(1.0, f64::max);
    let mut p = Plot::new(420.0, 320.0, (0.0, v.window_ms), (0.0, top * 1.1));
    p.axes(
        &format!("Decision times, {} at θ = {}", d.decoder, v.threshold),
        "ms after onset",
        "trials",
    );
    p.bars(&edges, &h, DECODER_COLOURS[0], 0.7);
    p.finish()
}

fn null_plot(title: &str, null: &[f64], observed: f64) -> String {
    let hi = null.iter().cloned().fold(observed, f64::max) * 1.1 + 1e-3;
    let (edges, h) = histogram(null, 0.0, hi, 30);
    let top = h.iter().cloned().fold(1.0, f64::max);
    let mut p = Plot::new(420.0, 260.0, (0.0, hi), (0.0, top * 1.15));
    p.axes(title, "bits (bias-corrected)", "shuffles");
    p.bars(&edges, &h, "#888", 0.7);
    p.line(
        &[(observed, 0.0), (observed, top * 1.1)],
        PALETTE[3],
        2.0,
        false,
    );
    p.text(
        observed,
        top * 1.05,
        &format!(" observed {observed:.3} "),
        PALETTE[3],
    );
    p.finish()
}

fn units_plot(v: &Validation) -> String {
    let n = v.units_ranked.len();
    let top = v
        .units_ranked
        .iter()
        .map(|u| u.info.bits.max(u.info.null_95))
        .fold(0.05, f64::max)
        * 1.1;
    let mut p = Plot::new(
        (60.0 + 18.0 * n as f64).max(420.0),
        300.0,
        (0.0, n as f64),
        (0.0, top),
    );
    // The unit ids are the x tick labels (no numeric ticks to collide with).
    p.xticks = false;
    p.bottom = 54.0;
    p.axes(
        "Units ranked by single-unit information (tick: shuffle-null 95th percentile)",
        "unit id, most informative first",
        "bits",
    );
    for (i, u) in v.units_ranked.iter().enumerate() {
        let col = if u.info.p_value < 0.05 {
            PALETTE[0]
        } else {
            "#aaa"
        };
        p.bars(&[i as f64 + 0.1, i as f64 + 0.9], &[u.info.bits], col, 0.85);
        p.line(
            &[
                (i as f64 + 0.1, u.info.null_95),
                (i as f64 + 0.9, u.info.null_95),
            ],
            PALETTE[3],
            2.0,
            false,
        );
        let (lx, ly) = (p.sx(i as f64 + 0.5) + 3.0, p.sy(0.0) + 6.0);
        let _ = write!(
            p.svg,
            r##"<text x="{lx:.1}" y="{ly:.1}" class="tk" text-anchor="end" transform="rotate(-90 {lx:.1} {ly:.1})">{}</text>"##,
            u.unit
        );
        p.dot(
            i as f64 + 0.5,
            u.info.bits,
            0.1,
            col,
            &format!(
                "unit {}: {:.3} bits, p = {:.3}, accuracy {:.1}%",
                u.unit,
                u.info.bits,
                u.info.p_value,
                100.0 * u.accuracy
            ),
        );
    }
    p.finish()
}

fn trajectories_plot(v: &Validation, x: &Extras) -> String {
    // One example trial per stimulus (up to 16: every stimulus the legend lists has its
    // panel), order-statistics decoder.
    let ns = v.stimuli.len();
    let mut out = String::new();
    for s in 0..ns.min(16) {
        let Some(i) = x.labels.iter().position(|&l| l == s) else {
            continue;
        };
        let tr = &x.trajectories[0][i];
        let nb = tr.len() / ns;
        let mut p = Plot::new(300.0, 200.0, (0.0, v.window_ms), (0.0, 1.0));
        p.axes(
            &format!("trial {} · presented {}", x.data.trials[i].id, v.stimuli[s]),
            "ms",
            "posterior",
        );
        p.line_dashed(
            &[(0.0, v.threshold), (v.window_ms, v.threshold)],
            REFERENCE,
            1.0,
            "1 3",
        );
        p.text(
            v.window_ms * 0.82,
            v.threshold - 0.07,
            &format!("θ {}", v.threshold),
            REFERENCE,
        );
        // The presented stimulus last, on top.
        for k in (0..ns).filter(|&k| k != s).chain([s]) {
            let pts: Vec<(f64, f64)> = (0..nb)
                .map(|b| ((b + 1) as f64 * v.bin_ms, tr[b * ns + k] as f64))
                .collect();
            p.line(&pts, colour(k), if k == s { 2.5 } else { 1.0 }, false);
        }
        out += &p.finish();
    }
    // Which colour is which stimulus.
    let note = if ns > 16 {
        format!("(example trials of the first 16 of the {ns} stimuli) ")
    } else {
        String::new()
    };
    out += &stimulus_legend(&v.stimuli, &note);
    out
}

/// Which colour is which stimulus, in a line under a row of plots.
fn stimulus_legend(stimuli: &[String], note: &str) -> String {
    let mut out = String::new();
    let _ = write!(out, "<div class=sub style=\"width:100%\">{note}");
    for (k, name) in stimuli.iter().enumerate() {
        let _ = write!(
            out,
            "<span style=\"white-space:nowrap;margin-right:14px\"><span style=\"display:inline-block;width:18px;height:3px;vertical-align:middle;background:{}\"></span> {}</span>",
            colour(k),
            esc(name)
        );
    }
    out += "</div>";
    out
}

/// A unit's KS plot: one band, ±1, is every cell's band (deviations are over each cell's own
/// critical value); a line per stimulus in its colour, the cells named in `bold` drawn bold.
fn ks_plot(f: &UnitFigures, title: &str, bold: &[&str], stimuli: &[String]) -> String {
    let mut p = Plot::new(330.0, 250.0, (0.0, 1.0), (-1.6, 1.6));
    p.axes(
        title,
        "model quantile",
        "deviation / cell's 95% critical value",
    );
    p.band(&[0.0, 1.0], &[-1.0, -1.0], &[1.0, 1.0], "#888");
    p.line(&[(0.0, 0.0), (1.0, 0.0)], "#444", 0.8, false);
    p.text(0.02, 1.05, "95% band of each cell", REFERENCE);
    // The bold lines last, on top.
    let is_bold = |st: usize| bold.contains(&stimuli[st].as_str());
    let order = (0..f.ks.len())
        .filter(|&st| !is_bold(st))
        .chain((0..f.ks.len()).filter(|&st| is_bold(st)));
    for st in order {
        if let Some(pts) = &f.ks[st] {
            p.line(pts, colour(st), if is_bold(st) { 2.6 } else { 1.3 }, false);
        }
    }
    p.finish()
}

fn unit_section(v: &Validation, ur: &UnitReport, f: &UnitFigures) -> String {
    let ns = v.stimuli.len();
    let mut s = String::new();
    let _ = write!(s, "<details><summary>unit {} — {:.3} bits (p = {:.3}), single-unit accuracy {:.1}%{}</summary><div class=row>",
        ur.unit, ur.info.bits, ur.info.p_value, 100.0 * ur.accuracy,
        if ur.cells.iter().any(|c| !c.ks_pass) { " · <b class=warn>goodness of fit flagged</b>" } else { "" });
    // Raster, grouped by stimulus.
    let per = RASTER_TRIALS;
    let rows = ns * per;
    let mut p = Plot::new(
        330.0,
        60.0 + 2.6 * rows as f64,
        (0.0, v.window_ms),
        (0.0, rows as f64),
    );
    p.axes(
        &format!("raster ({per} trials per stimulus)"),
        "ms after onset",
        "trials",
    );
    for (st, trials) in f.raster.iter().enumerate() {
        for (r, times) in trials.iter().enumerate() {
            let y = (rows - st * per - r) as f64 - 0.5;
            for &t in times {
                let (px, py) = (p.sx(t), p.sy(y));
                let _ = write!(
                    p.svg,
                    r##"<line x1="{px:.1}" y1="{:.1}" x2="{px:.1}" y2="{:.1}" stroke="{}" stroke-width="1"/>"##,
                    py - 1.1,
                    py + 1.1,
                    colour(st)
                );
            }
        }
    }
    s += &p.finish();
    // PSTH vs fitted density, per stimulus, in spikes/s. The legend (which colour is which
    // stimulus, for the raster too) sits in a right margin.
    let peak = f
        .psth
        .iter()
        .flat_map(|(h, fit)| h.iter().copied().chain(fit.iter().map(|x| x.1)))
        .fold(1.0, f64::max);
    let mut p = Plot::new(400.0, 250.0, (0.0, v.window_ms), (0.0, peak * 1.05));
    p.right = 70.0;
    p.axes(
        "PSTH (bars), fitted density (lines)",
        "ms after onset",
        "spikes/s",
    );
    for (st, (h, fit)) in f.psth.iter().enumerate() {
        p.bars(&f.psth_edges, h, colour(st), 0.18);
        p.line(fit, colour(st), 1.6, false);
    }
    let items: Vec<(String, &str)> = v
        .stimuli
        .iter()
        .enumerate()
        .map(|(i, n)| (n.clone(), colour(i)))
        .collect();
    p.legend_at(
        &items[..items.len().min(14)],
        v.window_ms * 1.01,
        peak * 1.05,
    );
    s += &p.finish();
    // Count histograms with the fitted distributions: one small panel per stimulus.
    let top = f
        .counts
        .iter()
        .flat_map(|(h, pmf)| h.iter().copied().chain(pmf.iter().map(|x| x.1)))
        .fold(0.05, f64::max);
    let edges: Vec<f64> = (0..=f.count_max + 1).map(|n| n as f64).collect();
    s += "<div><div class=sub><b>window counts</b> (bars: share of trials) <b>and fitted distribution</b> (line), per stimulus</div><div class=row style=\"gap:2px;max-width:520px\">";
    for (st, (h, pmf)) in f.counts.iter().enumerate() {
        let mut p = Plot::new(
            128.0,
            96.0,
            (0.0, (f.count_max + 1) as f64),
            (0.0, top * 1.05),
        );
        p.left = 28.0;
        p.bottom = 18.0;
        p.top = 16.0;
        p.axes(&v.stimuli[st], "", "");
        p.bars(&edges, h, colour(st), 0.35);
        p.line(pmf, colour(st), 1.5, false);
        s += &p.finish();
    }
    s += "</div></div>";
    let bold: Vec<&str> = ur
        .cells
        .iter()
        .filter(|c| !c.ks_pass)
        .map(|c| c.stimulus.as_str())
        .collect();
    s += &ks_plot(
        f,
        "time rescaling, held out: KS deviation",
        &bold,
        &v.stimuli,
    );
    s += "</div><table><tr><th>stimulus</th><th>trials</th><th>mean count</th><th>variance</th><th>Fano [95%]</th><th>family</th><th>KS D</th><th>95% critical</th><th>intervals</th><th>fit</th></tr>";
    for c in &ur.cells {
        let fano = c
            .fano
            .map(|(f, lo, hi)| format!("{f:.2} [{lo:.2}, {hi:.2}]"))
            .unwrap_or_else(|| "—".into());
        let _ = write!(s, "<tr><td>{}</td><td>{}</td><td>{:.2}</td><td>{:.2}</td><td>{fano}</td><td>{}</td><td>{:.3}</td><td>{:.3}</td><td>{}</td><td>{}</td></tr>",
            esc(&c.stimulus), c.n_trials, c.mean, c.variance, esc(&c.family), c.ks_d, c.ks_critical, c.ks_n,
            if c.ks_n < 5 { "untested" } else if c.ks_pass { "ok" } else { "<b class=warn>outside band</b>" });
    }
    s += "</table></details>";
    s
}

/// The whole page.
pub fn html(v: &Validation, x: &Extras) -> String {
    let mut s = String::new();
    let _ = write!(
        s,
        r#"<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>Auspex validation — {src}</title>
<style>
body{{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:24px auto;max-width:1400px;color:#222;padding:0 16px}}
h1{{font-size:22px;margin-bottom:4px}} h2{{font-size:17px;margin-top:28px;border-bottom:1px solid #ddd;padding-bottom:4px}}
.sub{{color:#666;font-size:13px}} .row{{display:flex;flex-wrap:wrap;gap:14px;align-items:flex-start}}
table{{border-collapse:collapse;font-size:13px;margin:8px 0}} td,th{{border:1px solid #ddd;padding:3px 7px;text-align:right}} th{{background:#f3f4f8}}
td:first-child,th:first-child{{text-align:left}} .warn{{color:#b00}} .ok{{color:#060}}
svg{{background:#fff}} .tk{{font-size:10px;fill:#333}} .lb{{font-size:11px;fill:#333}} .tt{{font-size:12px;font-weight:600;fill:#222}}
details{{margin:6px 0;border:1px solid #e3e3e8;border-radius:6px;padding:6px 10px}} summary{{cursor:pointer;font-size:14px}}
.big{{font-size:28px;font-weight:600}} .card{{border:1px solid #e3e3e8;border-radius:8px;padding:10px 16px;min-width:190px}}
</style></head><body>
<h1>Auspex validation report</h1>
<div class=sub>{src} · {trials} labelled trials · {nu} units × {ns} stimuli · window {win} ms in {bin} ms bins · {folds}-fold cross-validation stratified by stimulus (same folds for every decoder, models refitted on each training fold) · {sh} label shuffles · seed {seed} · {secs:.1} s</div>
"#,
        src = esc(&v.source),
        trials = v.trials,
        nu = v.units.len(),
        ns = v.stimuli.len(),
        win = v.window_ms,
        bin = v.bin_ms,
        folds = v.folds,
        sh = v.shuffles,
        seed = v.seed,
        secs = v.seconds
    );

    // Headline cards.
    let os = &v.decoders[0];
    let co = v
        .decoders
        .iter()
        .find(|d| d.decoder == "count-only")
        .unwrap_or(os);
    let i = &v.information;
    let _ = write!(
        s,
        r#"<div class=row style="margin-top:14px">
<div class=card><div class=sub>accuracy at window end ({})</div><div class=big>{:.1}%</div><div class=sub>95% CI {:.1}–{:.1}% · chance {:.1}% · count-only {:.1}%</div></div>
<div class=card><div class=sub>reliably above chance from</div><div class=big>{}</div><div class=sub>lower 95% bound above chance for {} consecutive bins</div></div>
<div class=card><div class=sub>decisions at θ = {} (after {} ms)</div><div class=big>{:.1}%</div><div class=sub>mean {:.1} ms, median {:.1} ms; {:.0}% before the window end</div></div>
<div class=card><div class=sub>information (presented ↔ decoded)</div><div class=big>{:.2} bits</div><div class=sub>of {:.2} possible · shuffle p = {:.4} · null 95% {:.3}</div></div>
<div class=card><div class=sub>goodness of fit (time rescaling)</div><div class=big>{} / {}</div><div class=sub>cells outside the 95% KS band</div></div>
</div>"#,
        os.decoder,
        100.0 * os.accuracy_end.accuracy,
        100.0 * os.accuracy_end.lo,
        100.0 * os.accuracy_end.hi,
        100.0 * v.chance,
        100.0 * co.accuracy_end.accuracy,
        os.earliest_reliable_ms
            .map(|t| format!("{t:.0} ms"))
            .unwrap_or_else(|| "never".into()),
        crate::validate::RELIABLE_RUN_BINS,
        v.threshold,
        v.min_time_ms,
        100.0 * os.decision.accuracy,
        os.decision.mean_time_ms,
        os.decision.median_time_ms,
        100.0 * os.decision.early_share,
        i.bits,
        (v.stimuli.len() as f64).log2(),
        i.p_value,
        i.null_95,
        v.goodness_of_fit.cells_failed,
        v.goodness_of_fit.cells_tested
    );

    s += "<h2>How well and how early</h2><div class=row>";
    s += &accuracy_plot(v);
    s += &tradeoff_plot(v);
    s += "</div><table><tr><th>decoder</th><th>window-end accuracy [95%]</th><th>reliable from</th><th>decision accuracy at θ</th><th>mean / median decision time</th><th>information (bits)</th></tr>";
    for d in &v.decoders {
        let _ = write!(s, "<tr><td>{}</td><td>{:.1}% [{:.1}, {:.1}]</td><td>{}</td><td>{:.1}% [{:.1}, {:.1}]</td><td>{:.1} / {:.1} ms</td><td>{:.3}</td></tr>",
            d.decoder, 100.0 * d.accuracy_end.accuracy, 100.0 * d.accuracy_end.lo, 100.0 * d.accuracy_end.hi,
            d.earliest_reliable_ms.map(|t| format!("{t:.0} ms")).unwrap_or_else(|| "never".into()),
            100.0 * d.decision.accuracy, 100.0 * d.decision.lo, 100.0 * d.decision.hi, d.decision.mean_time_ms, d.decision.median_time_ms, d.info_bits);
    }
    s += "</table><h2>Decisions</h2><p class=sub>Every held-out trial is decided once: by the threshold when the posterior reaches θ after the minimum time, else at the window end. This table counts <i>all</i> decisions; the promise table below counts only those the threshold took (the promise is theirs), so the two differ where window-end decisions are many or weak.</p><div class=row>";
    s += &decision_time_plot(v);
    s += "</div><table><tr><th>threshold</th>";
    for d in &v.decoders {
        let _ = write!(
            s,
            "<th>{}: accuracy of all decisions [95%]</th><th>mean time</th>",
            d.decoder
        );
    }
    s += "</tr>";
    for (k, th) in crate::validate::THRESHOLDS.iter().enumerate() {
        let _ = write!(s, "<tr><td>{th}</td>");
        for d in &v.decoders {
            let t = &d.tradeoff[k];
            let _ = write!(
                s,
                "<td>{:.1}% [{:.1}, {:.1}]</td><td>{:.1} ms</td>",
                100.0 * t.accuracy,
                100.0 * t.lo,
                100.0 * t.hi,
                t.mean_time_ms
            );
        }
        s += "</tr>";
    }
    s += "</table><div class=row>";
    s += &heatmap(
        &format!("{} at the decision (θ = {})", os.decoder, v.threshold),
        &os.confusion_decision,
        &v.stimuli,
    );
    s += &heatmap(
        &format!("{} at the window end", os.decoder),
        &os.confusion_end,
        &v.stimuli,
    );
    s += &heatmap(
        &format!("{} at the window end", co.decoder),
        &co.confusion_end,
        &v.stimuli,
    );
    s += "</div><h2>Example posterior trajectories (order statistics; bold: presented stimulus; dotted: threshold θ)</h2><div class=row>";
    s += &trajectories_plot(v, x);
    s += "</div><h2>How much: information and its shuffle null</h2>";
    let _ = write!(s, "<p class=sub>Mutual information between presented and window-end decoded stimulus: plug-in {:.3} bits, Panzeri–Treves bias correction {:+.3} bits (only a positive first-order bias is subtracted), corrected {:.3} bits (kept within [0, H(presented)]). Null: labels permuted within each training fold only (held-out labels untouched), cells refitted on the shuffled labels with the family and bandwidth chosen on the real fold, held-out trials decoded at the window end; p = (1 + #null ≥ observed) / (1 + shuffles).</p><div class=row>",
        i.plugin_bits, i.bits - i.plugin_bits, i.bits);
    s += &null_plot(
        "population information: shuffle null (grey bars) and observed (vermillion line)",
        &i.null_bits,
        i.bits,
    );
    s += &units_plot(v);
    s += "</div><h2>Do decisions keep their promise?</h2><p class=sub>Deciding at threshold θ promises to be right at least a share θ of the time. Below, the order-statistics decoder's decisions on held-out trials: realised accuracy with its 95% Clopper–Pearson interval for every threshold, flagged where the whole interval lies below the promise; and the reliability of the stated confidence (top posterior, in 10 bins of equal counts so the crowded range above θ reads) at decision time and at the window end, with the expected calibration error (ECE over bins of 0.1: the trial-weighted mean gap between confidence and accuracy). Points below the diagonal are over-confident.</p><div class=row>";
    s += &calibration_plot(v);
    s += "<table><tr><th>threshold θ (the promise)</th><th>decisions taken by the threshold: held-out accuracy [95%]</th><th></th></tr>";
    for p in &v.calibration.promises {
        let _ = write!(
            s,
            "<tr><td>{}</td><td>{:.1}% [{:.1}, {:.1}]</td><td class={}>{}</td></tr>",
            p.threshold,
            100.0 * p.accuracy,
            100.0 * p.lo,
            100.0 * p.hi,
            if p.kept { "ok" } else { "warn" },
            if p.kept { "kept" } else { "broken" }
        );
    }
    s += "</table><table><tr><th>confidence at</th><th>ECE</th><th>trials</th></tr>";
    for r in &v.calibration.reliability {
        let n: u64 = r.bins.iter().map(|b| b.n).sum();
        let _ = write!(
            s,
            "<tr><td>{}</td><td>{:.3}</td><td>{n}</td></tr>",
            esc(&r.when),
            r.ece
        );
    }
    s += "</table>";
    if !v.calibration.methods.is_empty() {
        let _ = write!(
            s,
            "</div><h2>Keeping the promise: recalibration compared</h2><p class=sub>Temperature scaling (Guo, Pleiss, Sun &amp; Weinberger 2017): the posterior becomes softmax(ln prior + β·log L), β fitted to minimise the held-out log loss of the presented stimulus — one β for the window (<b>temperature</b>) or one per band of time since onset, bands doubling from the minimum decision time (<b>banded-temperature</b>); or one β with a share ε of the prior mixed in, (1 − ε)·posterior + ε·prior, ε on a grid up to 0.05 (Huber's ε-contamination model, <b>temperature-floor</b>): the posterior then never claims more certainty than the model's rate of confident errors allows. Here each outer fold's β is fitted on held-out decoding <i>inside</i> its training trials (nested cross-validation), then applied to the fold's held-out trials; decisions are replayed exactly as the engine takes them. A promise θ is kept when the 95% Clopper–Pearson interval of the accuracy reaches θ. <code>auspex fit</code> applies <b>{}</b> by default (<code>--calibration</code>).</p><div class=row>",
            esc(&v.calibration.default_method)
        );
        s += &promise_plot(v);
        s += &promise_time_plot(v);
        s += "</div><div class=row><table><tr><th>threshold</th>";
        for m in &v.calibration.methods {
            let _ = write!(
                s,
                "<th>{}</th>",
                esc(if m.method == "none" {
                    "raw posterior"
                } else {
                    &m.method
                })
            );
        }
        s += "</tr>";
        let n = v.calibration.methods[0].record.len();
        for i in 0..n {
            let th = v.calibration.methods[0].record[i].threshold;
            if th < 0.8 {
                continue;
            }
            let _ = write!(s, "<tr><td>{th}</td>");
            for m in &v.calibration.methods {
                let e = &m.record[i];
                let kept = e.kept();
                let (ea, elo, ehi) = e.early_accuracy();
                let _ = write!(
                    s,
                    "<td class={}>{}/{} = {:.1}%<br><span class=sub>[{:.1}, {:.1}] · all {:.1}% · {:.0} ms{}</span></td>",
                    if kept { "ok" } else { "warn" },
                    e.early_correct,
                    e.early,
                    100.0 * ea,
                    100.0 * elo,
                    100.0 * ehi,
                    100.0 * e.accuracy(),
                    e.median_decision_ms,
                    match m.time_ratio.get(i).copied().flatten() {
                        Some(r) if m.method != "none" => format!(" (×{r:.2})"),
                        _ => String::new(),
                    }
                );
            }
            s += "</tr>";
        }
        s += "<tr><td>held-out log loss</td>";
        for m in &v.calibration.methods {
            // The raw posterior has no factor and no floor: say so rather than "β 1–1; ε 0–0".
            let beta = if m.method == "none" {
                "no β".to_string()
            } else if (m.factor_range.1 - m.factor_range.0).abs() < 5e-4 {
                format!("β {:.3}", m.factor_range.0)
            } else {
                format!("β {:.3}–{:.3}", m.factor_range.0, m.factor_range.1)
            };
            let eps = if m.floor_range.1 <= 0.0 {
                String::new()
            } else {
                format!(" · ε {:.3}–{:.3}", m.floor_range.0, m.floor_range.1)
            };
            let _ = write!(
                s,
                "<td>{:.4} nats per bin<br><span class=sub>{beta}{eps} · ECE at decision {:.3}</span></td>",
                m.log_loss,
                m.at_decision.ece
            );
        }
        s += "</tr></table><p class=sub>Each cell: the decisions the threshold took, right of all it took = their accuracy; below, its 95% Clopper–Pearson interval, the accuracy of all decisions (window-end ones included) and the median decision time; (×r): that time divided by the raw posterior's at the same realised accuracy (interpolated along its trade-off). Green: the promise kept; red: broken. β ranges over the outer folds' fits.</p>";
    }
    if !v.learning_curve.is_empty() {
        s += "</div><h2>How many trials: the learning curve</h2><p class=sub>The same folds, with each fold's training trials cut to n per stimulus (a seeded random subset), the model fitted on them as <code>auspex fit</code> fits and the fold's untouched held-out trials decoded at the window end (order statistics, all units). Bands: 95% Clopper–Pearson interval of accuracy; ±1.96 standard errors of the information. It answers how many trials per stimulus a session of this kind needs.</p><div class=row>";
        s += &learning_plots(v);
        s += "<table><tr><th>trials per stimulus</th><th>held-out trials</th><th>accuracy [95%]</th><th>information (bits) ± s.e.</th></tr>";
        for p in &v.learning_curve {
            let _ = write!(
                s,
                "<tr><td>{}</td><td>{}</td><td>{:.1}% [{:.1}, {:.1}]</td><td>{:.3} ± {:.3}</td></tr>",
                p.trials_per_stimulus,
                p.held_out,
                100.0 * p.accuracy,
                100.0 * p.lo,
                100.0 * p.hi,
                p.info_bits,
                p.info_se_bits
            );
        }
        s += "</table>";
    }
    s += "</div><h2>Units</h2><p class=sub>Ranked by single-unit information (window-end decoding of held-out trials with that unit alone). Open a unit for its raster, PSTH with the fitted density, count distributions, KS plot and per-stimulus table. <b>fit flags</b>: how many of the unit's cells (one per stimulus) fall outside the 95% band of the time-rescaling test — their spike times are not described well by the fitted count and density; <b>p</b> in red: the unit's information is not above its label-shuffle null at 5%.</p>";
    s += "<table><tr><th>rank</th><th>unit</th><th>accuracy</th><th>information (bits)</th><th>null 95%</th><th>p</th><th>families</th><th>fit flags</th></tr>";
    for (r, u) in v.units_ranked.iter().enumerate() {
        let mut fams: Vec<&str> = u.cells.iter().map(|c| c.family.as_str()).collect();
        fams.sort();
        fams.dedup();
        let flags = u.cells.iter().filter(|c| !c.ks_pass).count();
        let _ = write!(s, "<tr><td>{}</td><td>{}</td><td>{:.1}%</td><td>{:.3}</td><td>{:.3}</td><td class={}>{:.3}</td><td>{}</td><td>{}</td></tr>",
            r + 1, u.unit, 100.0 * u.accuracy, u.info.bits, u.info.null_95, if u.info.p_value < 0.05 { "ok" } else { "warn" }, u.info.p_value, fams.join(", "),
            if flags == 0 { "—".to_string() } else { format!("<b class=warn>{flags}</b>") });
    }
    s += "</table>";
    // Pictures for the most informative units and every unit whose fit is flagged; a page with
    // thousands of units' plots would not open. The table above and the JSON hold every unit.
    for f in &x.unit_figures {
        if let Some(u) = v.units_ranked.iter().find(|u| u.unit == f.unit) {
            s += &unit_section(v, u, f);
        }
    }
    let shown = x.unit_figures.len();
    let left_out = v.units_ranked.len().saturating_sub(shown);
    if left_out > 0 {
        let _ = write!(s, "<p class=sub>Pictures for the {UNIT_FIGURES_MAX} most informative units and every unit with a flagged fit ({shown} shown); the other {left_out} units are in the table above and in validation.json.</p>");
    }
    s += "<h2 id=goodness-of-fit>Goodness of fit</h2>";
    let _ = write!(s, "<p class=sub>Discrete-time time-rescaling (Haslinger, Pipa &amp; Brown 2010) on held-out trials, each under the model of its presented stimulus: per bin, the model's probability of a spike given the spikes so far; bins holding spikes are events, their randomised rescaled intervals should be Uniform(0, 1). Cells whose KS statistic exceeds the exact 95% critical value are flagged: {} of {} tested.</p>",
        v.goodness_of_fit.cells_failed, v.goodness_of_fit.cells_tested);
    // The KS plots in view, not only inside the collapsed unit sections: the flagged units'
    // first, then the most informative, up to KS_PLOTS_SHOWN.
    let flagged = |f: &&UnitFigures| v.goodness_of_fit.failed.iter().any(|(u, _)| *u == f.unit);
    let shown: Vec<&UnitFigures> = x
        .unit_figures
        .iter()
        .filter(flagged)
        .chain(x.unit_figures.iter().filter(|f| !flagged(f)))
        .filter(|f| f.ks.iter().any(|k| k.is_some()))
        .take(KS_PLOTS_SHOWN)
        .collect();
    if !shown.is_empty() {
        s += "<div class=row>";
        for f in &shown {
            let bold: Vec<&str> = v
                .goodness_of_fit
                .failed
                .iter()
                .filter(|(u, _)| *u == f.unit)
                .map(|(_, st)| st.as_str())
                .collect();
            let title = if bold.is_empty() {
                format!("unit {}: KS deviation", f.unit)
            } else {
                format!(
                    "unit {}: KS deviation, {} flagged (bold)",
                    f.unit,
                    bold.join(", ")
                )
            };
            s += &ks_plot(f, &title, &bold, &v.stimuli);
        }
        s += "</div>";
        s += &stimulus_legend(&v.stimuli, "");
    }
    if !v.goodness_of_fit.failed.is_empty() {
        s += "<p>";
        s += &v
            .goodness_of_fit
            .failed
            .iter()
            .map(|(u, st)| format!("unit {u} / {}", esc(st)))
            .collect::<Vec<_>>()
            .join(" · ");
        s += "</p>";
    }
    s += "<p class=sub>Generated by auspex validate. Figures are for the data named above; they say how this model decodes held-out trials of this session, not how it will do on another day.</p></body></html>\n";
    s
}
