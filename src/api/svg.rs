//! SVG pictures of the law of the count: the exact pmf as bars, the tail asked about shaded, the threshold
//! marked and approximations overlaid as lines, on a linear or a logarithmic probability axis.
//!
//! Pure rendering of the chart question's answer (`analytics::chart`, which also chooses the counts): its
//! probabilities come as natural logarithms, so that values below the f64 range still plot on the log axis,
//! and this module only turns them into markup, section by section. Output depends on nothing but the input
//! (fixed number formatting, no clock, no randomness), so the same request always gives the same bytes.

use crate::analytics::chart::ChartData;
use crate::analytics::scenario::CHART_CAUTION;
use crate::engine::{MethodId, Side};
use std::f64::consts::LN_10;
use std::fmt::Write;

/// Colours of the picture: one ink per series, chosen to stay apart for common colour-vision deficiencies
/// (they also differ in dash pattern).
const INK: &str = "#1d2b36";
const MUTED: &str = "#5d6b75";
const BAR: &str = "#7f93a3";
const TAIL_BAR: &str = "#c4532a";
const TAIL_FILL: &str = "#f3d9cb";
const GRID: &str = "#e3e0d8";

fn overlay_style(m: MethodId) -> (&'static str, &'static str) {
    match m {
        MethodId::Normal => ("#1f7a5a", "6 4"),
        MethodId::Poisson => ("#7a4ea3", "2 3"),
        MethodId::Saddlepoint => ("#1466b0", ""),
        MethodId::Edgeworth => ("#9a6b00", "9 3 2 3"),
        MethodId::Exact | MethodId::Auto => (INK, ""),
    }
}

/// Method names as the API spells them.
pub fn method_name(m: MethodId) -> &'static str {
    match m {
        MethodId::Exact => "exact",
        MethodId::Normal => "normal",
        MethodId::Edgeworth => "edgeworth",
        MethodId::Poisson => "poisson",
        MethodId::Saddlepoint => "saddlepoint",
        MethodId::Auto => "auto",
    }
}

/// "P(S ≥ k)" and friends.
pub fn side_label(side: Side, k: u64) -> String {
    match side {
        Side::Upper => format!("P(S \u{2265} {k})"),
        Side::Lower => format!("P(S \u{2264} {k})"),
        Side::Point => format!("P(S = {k})"),
    }
}

/// Whether count c lies in the region asked about.
pub fn in_tail(side: Side, c: u64, k: u64) -> bool {
    match side {
        Side::Upper => c >= k,
        Side::Lower => c <= k,
        Side::Point => c == k,
    }
}

/// A probability given by its natural log, with 4 significant digits: decimal down to 0.001, then `1.234e-5`,
/// however small (the exponent comes from the logarithm, not from an f64 that would underflow).
pub fn fmt_prob(ln: Option<f64>) -> String {
    let Some(ln) = ln else { return "0".into() };
    if !ln.is_finite() {
        return "0".into();
    }
    let l10 = ln / LN_10;
    let mut e = l10.floor();
    let mut m = 10f64.powf(l10 - e);
    // Rounding to 4 digits may carry into the next decade.
    if (m * 1000.0).round() >= 10000.0 {
        m /= 10.0;
        e += 1.0;
    }
    if e >= -3.0 {
        let v = m * 10f64.powf(e);
        let decimals = (3.0 - e).clamp(0.0, 7.0) as usize;
        let s = format!("{v:.decimals$}");
        trim_zeros(&s)
    } else {
        format!("{}e{}", trim_zeros(&format!("{m:.3}")), e as i64)
    }
}

fn trim_zeros(s: &str) -> String {
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s.to_string()
    }
}

/// A count with thousands separators.
fn fmt_count(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, ch) in s.chars().enumerate() {
        if i > 0 && (s.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(ch);
    }
    out
}

/// A real number with `sig` significant digits, decimal notation.
fn fmt_real(x: f64, sig: i32) -> String {
    if x == 0.0 || !x.is_finite() {
        return "0".into();
    }
    let mag = x.abs().log10().floor() as i32;
    let decimals = (sig - 1 - mag).clamp(0, 12) as usize;
    trim_zeros(&format!("{x:.decimals$}"))
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

/// 1, 2 or 5 times a power of ten, at least `raw`.
fn nice_step(raw: f64) -> f64 {
    if raw.is_nan() || raw <= 0.0 {
        return 1.0;
    }
    let mag = 10f64.powf(raw.log10().floor());
    let norm = raw / mag;
    let f = if norm <= 1.0 {
        1.0
    } else if norm <= 2.0 {
        2.0
    } else if norm <= 5.0 {
        5.0
    } else {
        10.0
    };
    f * mag
}

/// Linear probability tick label: decimals while the step allows, else `2e-5`.
fn fmt_linear_tick(v: f64, step: f64) -> String {
    if v == 0.0 {
        return "0".into();
    }
    if step >= 1e-3 {
        let decimals = (-step.log10().floor()).clamp(0.0, 6.0) as usize;
        trim_zeros(&format!("{v:.decimals$}"))
    } else {
        let e = v.log10().floor();
        let m = v / 10f64.powf(e);
        format!("{}e{}", trim_zeros(&format!("{m:.2}")), e as i64)
    }
}

/// The plot's geometry and vertical scale, shared by every section of the drawing.
struct Frame {
    w: f64,
    h: f64,
    left: f64,
    top: f64,
    /// Plot width and height.
    pw: f64,
    ph: f64,
    /// Horizontal room of one count.
    slot: f64,
    base_y: f64,
    /// The vertical range, in log10 units on the log axis and in probability on the linear one.
    y_lo: f64,
    y_hi: f64,
    log_scale: bool,
}

impl Frame {
    fn x_of(&self, i: usize) -> f64 {
        self.left + self.slot * (i as f64 + 0.5)
    }

    fn y_of(&self, ln: f64) -> f64 {
        let v = if self.log_scale { ln / LN_10 } else { ln.exp() };
        let f = ((v - self.y_lo) / (self.y_hi - self.y_lo)).clamp(-0.05, 1.05);
        self.top + self.ph * (1.0 - f)
    }
}

/// The vertical range and its ticks (value, label; the log axis labels its ticks as powers of ten).
fn vertical_scale(c: &ChartData) -> (f64, f64, Vec<(f64, String)>) {
    let all_ln = c.exact_ln.iter().chain(c.overlays.iter().flat_map(|(_, ln)| ln.iter())).filter_map(|v| *v);
    if c.log_scale {
        let hi_l = all_ln.fold(f64::NEG_INFINITY, f64::max) / LN_10;
        let lo_l = c.exact_ln.iter().filter_map(|v| *v).map(|l| l / LN_10).fold(f64::INFINITY, f64::min);
        // The floor sits a little below the smallest bar, so that bar keeps a visible height.
        let (mut lo, mut hi) = if hi_l.is_finite() && lo_l.is_finite() {
            ((lo_l - 0.02 * (hi_l - lo_l).max(1.0)).floor(), hi_l.ceil())
        } else {
            (-1.0, 0.0)
        };
        hi = hi.min(0.0);
        if lo >= hi {
            lo = hi - 1.0;
        }
        let step = nice_step((hi - lo) / 6.0).max(1.0);
        lo = (lo / step).floor() * step;
        hi = (hi / step).ceil() * step;
        let mut ticks = Vec::new();
        let mut t = lo;
        while t <= hi + 1e-9 {
            ticks.push((t, String::new()));
            t += step;
        }
        (lo, hi, ticks)
    } else {
        let max = all_ln.fold(f64::NEG_INFINITY, f64::max).exp().min(1.0);
        let max = if max > 0.0 { max } else { 1.0 };
        let step = nice_step(max / 5.0);
        let top = (max / step).ceil() * step;
        let mut ticks = Vec::new();
        let mut i = 0.0;
        while i * step <= top * (1.0 + 1e-9) {
            ticks.push((i * step, fmt_linear_tick(i * step, step)));
            i += 1.0;
        }
        (0.0, top, ticks)
    }
}

/// Render the picture.
pub fn render(c: &ChartData) -> String {
    let w = c.width as f64;
    let h = c.height as f64;
    let n = c.counts.len().max(1);
    let (legend_h, caution_h) = (22.0, 14.0);
    let (left, right, top, bottom) = (74.0, 18.0, 54.0, 52.0 + legend_h + caution_h);
    let pw = (w - left - right).max(10.0);
    let ph = (h - top - bottom).max(10.0);
    let (y_lo, y_hi, ticks) = vertical_scale(c);
    let f =
        Frame { w, h, left, top, pw, ph, slot: pw / n as f64, base_y: top + ph, y_lo, y_hi, log_scale: c.log_scale };
    let mut s = String::with_capacity(8192 + 120 * n);
    header(&mut s, c, &f);
    tail_band(&mut s, c, &f);
    y_axis(&mut s, &f, &ticks);
    bars(&mut s, c, &f);
    overlays(&mut s, c, &f);
    threshold_marker(&mut s, c, &f);
    x_axis(&mut s, c, &f);
    legend(&mut s, c, &f);
    caution(&mut s, &f);
    s.push_str("</svg>\n");
    s
}

/// The document's opening, its title (the probability asked about) and subtitle, and the plot's clip path.
fn header(s: &mut String, c: &ChartData, f: &Frame) {
    let (w, h, left, top, pw, ph) = (f.w, f.h, f.left, f.top, f.pw, f.ph);
    let title = format!("{} = {}", side_label(c.side, c.threshold), fmt_prob(c.tail_ln));
    let subtitle = format!(
        "{} exposures \u{b7} mean {} \u{b7} sd {}{}",
        fmt_count(c.exposures),
        fmt_real(c.mean, 5),
        fmt_real(c.sd, 4),
        match c.span {
            // With loss units the stride counts lattice points, each `span` units apart.
            Some(h) if c.stride > h =>
                format!(" \u{b7} every {}th lattice point ({h} units apart) plotted", c.stride / h),
            Some(h) if h > 1 => format!(" \u{b7} lattice points {h} units apart"),
            Some(_) => String::new(),
            None if c.stride > 1 => format!(" \u{b7} every {}th count plotted", c.stride),
            None => String::new(),
        }
    );
    let _ = write!(
        s,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{w}\" height=\"{h}\" viewBox=\"0 0 {w} {h}\" \
         role=\"img\" aria-labelledby=\"chart-title chart-desc\" font-family=\"system-ui, sans-serif\">\n\
         <title id=\"chart-title\">{t}</title>\n\
         <desc id=\"chart-desc\">Exact probability of each count, tail region shaded, threshold marked; {sub}. \
         Assumes independent exposures.</desc>\n\
         <rect width=\"{w}\" height=\"{h}\" fill=\"#fbfaf7\"/>\n\
         <text x=\"{left}\" y=\"22\" font-size=\"15\" font-weight=\"600\" fill=\"{INK}\">{t}</text>\n\
         <text x=\"{left}\" y=\"40\" font-size=\"11.5\" fill=\"{MUTED}\">{sub}</text>\n\
         <defs><clipPath id=\"plot-area\"><rect x=\"{left}\" y=\"{top}\" width=\"{pw:.2}\" height=\"{ph:.2}\"/></clipPath></defs>\n",
        t = esc(&title),
        sub = esc(&subtitle),
    );
}

/// The tail region: one band over the counts in the tail.
fn tail_band(s: &mut String, c: &ChartData, f: &Frame) {
    let tail_idx: Vec<usize> = (0..c.counts.len()).filter(|&i| in_tail(c.side, c.counts[i], c.threshold)).collect();
    if let (Some(&a), Some(&b)) = (tail_idx.first(), tail_idx.last()) {
        let x0 = f.left + f.slot * a as f64;
        let x1 = f.left + f.slot * (b + 1) as f64;
        let _ = writeln!(
            s,
            "<rect class=\"tail-region\" x=\"{x0:.2}\" y=\"{}\" width=\"{:.2}\" height=\"{:.2}\" fill=\"{TAIL_FILL}\" fill-opacity=\"0.55\"/>",
            f.top,
            x1 - x0,
            f.ph
        );
    }
}

/// Grid lines and probability ticks.
fn y_axis(s: &mut String, f: &Frame, ticks: &[(f64, String)]) {
    let (left, top, pw, ph) = (f.left, f.top, f.pw, f.ph);
    let _ = writeln!(s, "<g class=\"y-axis\" font-size=\"11\" fill=\"{MUTED}\">");
    for (v, label) in ticks {
        let y = top + ph * (1.0 - (v - f.y_lo) / (f.y_hi - f.y_lo));
        let _ = writeln!(
            s,
            "<line x1=\"{left}\" x2=\"{:.2}\" y1=\"{y:.2}\" y2=\"{y:.2}\" stroke=\"{GRID}\" stroke-width=\"1\"/>",
            left + pw
        );
        if f.log_scale {
            let _ = writeln!(
                s,
                "<text x=\"{:.2}\" y=\"{:.2}\" text-anchor=\"end\">10<tspan dy=\"-5\" font-size=\"8.5\">{}</tspan></text>",
                left - 6.0,
                y + 4.0,
                *v as i64
            );
        } else {
            let _ =
                writeln!(s, "<text x=\"{:.2}\" y=\"{:.2}\" text-anchor=\"end\">{label}</text>", left - 6.0, y + 4.0);
        }
    }
    s.push_str("</g>\n");
}

/// The exact pmf as bars, those in the tail in their own colour.
fn bars(s: &mut String, c: &ChartData, f: &Frame) {
    let base_y = f.base_y;
    let bar_w = if f.slot > 3.0 { f.slot * 0.82 } else { f.slot };
    let mut plain = String::new();
    let mut tail = String::new();
    for (i, v) in c.exact_ln.iter().enumerate() {
        let Some(l) = v else { continue };
        let y = f.y_of(*l);
        if base_y - y < 0.05 {
            continue;
        }
        let x = f.x_of(i) - bar_w / 2.0;
        let target = if in_tail(c.side, c.counts[i], c.threshold) { &mut tail } else { &mut plain };
        let _ = write!(target, "M{x:.2} {base_y:.2}V{y:.2}h{bar_w:.2}V{base_y:.2}Z");
    }
    let _ = writeln!(s, "<path class=\"bars\" d=\"{plain}\" fill=\"{BAR}\"/>");
    let _ = writeln!(s, "<path class=\"tail-bars\" d=\"{tail}\" fill=\"{TAIL_BAR}\"/>");
}

/// The approximations as lines, clipped to the plot; a gap where a method gives 0.
fn overlays(s: &mut String, c: &ChartData, f: &Frame) {
    for (method, ln) in &c.overlays {
        let (col, dash) = overlay_style(*method);
        let mut d = String::new();
        let mut pen_down = false;
        for (i, v) in ln.iter().enumerate() {
            match v {
                Some(l) => {
                    let _ = write!(d, "{}{:.2} {:.2}", if pen_down { "L" } else { "M" }, f.x_of(i), f.y_of(*l));
                    pen_down = true;
                }
                None => pen_down = false,
            }
        }
        let dash_attr = if dash.is_empty() { String::new() } else { format!(" stroke-dasharray=\"{dash}\"") };
        let _ = writeln!(
            s,
            "<path class=\"overlay overlay-{}\" d=\"{d}\" fill=\"none\" stroke=\"{col}\" stroke-width=\"2\"{dash_attr} clip-path=\"url(#plot-area)\"/>",
            method_name(*method)
        );
    }
}

/// The threshold's dashed line and label (at the nearest edge when it is outside the plotted counts).
fn threshold_marker(s: &mut String, c: &ChartData, f: &Frame) {
    // A threshold in units between two lattice points is marked at the next one (where S >= k begins).
    let at = c.counts.iter().position(|&k| k == c.threshold).or_else(|| {
        if c.threshold < *c.counts.first()? {
            Some(0)
        } else {
            c.counts.iter().position(|&k| k > c.threshold).or(Some(c.counts.len() - 1))
        }
    });
    if let Some(i) = at {
        let x = f.x_of(i);
        let _ = writeln!(
            s,
            "<g class=\"threshold\"><line x1=\"{x:.2}\" x2=\"{x:.2}\" y1=\"{:.2}\" y2=\"{:.2}\" stroke=\"{INK}\" stroke-width=\"1.5\" stroke-dasharray=\"4 3\"/>\
             <text x=\"{x:.2}\" y=\"{:.2}\" font-size=\"11\" text-anchor=\"middle\" fill=\"{INK}\">k = {}</text></g>",
            f.top - 2.0,
            f.base_y,
            f.top - 5.0,
            fmt_count(c.threshold)
        );
    }
}

/// The axes, the count ticks at round numbers and both axis labels.
fn x_axis(s: &mut String, c: &ChartData, f: &Frame) {
    let (left, top, pw, ph, slot, base_y) = (f.left, f.top, f.pw, f.ph, f.slot, f.base_y);
    let _ = writeln!(
        s,
        "<path class=\"axes\" d=\"M{left} {top}V{base_y:.2}H{:.2}\" fill=\"none\" stroke=\"{INK}\" stroke-width=\"1\"/>",
        left + pw
    );
    let (first, last) = (*c.counts.first().unwrap_or(&0), *c.counts.last().unwrap_or(&0));
    let per_label = 64.0 / slot;
    let step = (nice_step(per_label.max(1.0) * c.stride as f64) as u64).max(c.stride).max(1);
    let _ = writeln!(s, "<g class=\"x-axis\" font-size=\"11\" fill=\"{MUTED}\">");
    let mut t = first.div_ceil(step) * step;
    while t <= last {
        // Round counts at their own place, which with a stride may fall between bars.
        let x = left + slot * ((t - first) as f64 / c.stride as f64 + 0.5);
        let _ = writeln!(
            s,
            "<line x1=\"{x:.2}\" x2=\"{x:.2}\" y1=\"{base_y:.2}\" y2=\"{:.2}\" stroke=\"{INK}\"/><text x=\"{x:.2}\" y=\"{:.2}\" text-anchor=\"middle\">{}</text>",
            base_y + 4.0,
            base_y + 16.0,
            fmt_count(t)
        );
        match t.checked_add(step) {
            Some(n) => t = n,
            None => break,
        }
    }
    s.push_str("</g>\n");
    let xlab = if c.span.is_some() { "total loss k, in units" } else { "number of events k" };
    let _ = writeln!(
        s,
        "<text class=\"x-label\" x=\"{:.2}\" y=\"{:.2}\" font-size=\"12\" text-anchor=\"middle\" fill=\"{INK}\">{xlab}</text>",
        left + pw / 2.0,
        base_y + 34.0
    );
    let ylab = if c.log_scale { "P(S = k), log scale" } else { "P(S = k)" };
    let _ = writeln!(
        s,
        "<text class=\"y-label\" transform=\"translate(16 {:.2}) rotate(-90)\" font-size=\"12\" text-anchor=\"middle\" fill=\"{INK}\">{ylab}</text>",
        top + ph / 2.0
    );
}

/// One legend entry per series: (colour, dash, drawn as a bar, label).
fn legend(s: &mut String, c: &ChartData, f: &Frame) {
    let ly = f.h - 28.0;
    let mut lx = f.left;
    let _ = writeln!(s, "<g class=\"legend\" font-size=\"11.5\" fill=\"{INK}\">");
    let tail_label = format!("tail {}", side_label(c.side, c.threshold));
    let mut entries: Vec<(&str, &str, bool, &str)> = vec![(BAR, "", true, "exact"), (TAIL_BAR, "", true, &tail_label)];
    for (method, _) in &c.overlays {
        let (col, dash) = overlay_style(*method);
        entries.push((col, dash, false, method_name(*method)));
    }
    for (col, dash, bar, label) in entries {
        if bar {
            let _ = write!(s, "<rect x=\"{lx:.2}\" y=\"{:.2}\" width=\"16\" height=\"10\" fill=\"{col}\"/>", ly - 9.0);
        } else {
            let dash_attr = if dash.is_empty() { String::new() } else { format!(" stroke-dasharray=\"{dash}\"") };
            let _ = write!(
                s,
                "<line x1=\"{lx:.2}\" x2=\"{:.2}\" y1=\"{:.2}\" y2=\"{:.2}\" stroke=\"{col}\" stroke-width=\"2\"{dash_attr}/>",
                lx + 16.0,
                ly - 4.0,
                ly - 4.0
            );
        }
        let _ = writeln!(s, "<text x=\"{:.2}\" y=\"{ly:.2}\">{}</text>", lx + 22.0, esc(label));
        lx += 30.0 + 6.6 * label.chars().count() as f64;
    }
    s.push_str("</g>\n");
}

/// The cautions every answer carries, in one small line under the legend (squeezed to the width when the
/// picture is narrow, so that it never leaves the picture).
fn caution(s: &mut String, f: &Frame) {
    let size = 9.5;
    let room = f.w - f.left - 18.0;
    // About half an em per character in a sans-serif face.
    let natural = 0.5 * size * CHART_CAUTION.chars().count() as f64;
    let fit = if natural > room {
        format!(" textLength=\"{room:.2}\" lengthAdjust=\"spacingAndGlyphs\"")
    } else {
        String::new()
    };
    let _ = writeln!(
        s,
        "<text class=\"caution\" x=\"{}\" y=\"{:.2}\" font-size=\"{size}\" fill=\"{MUTED}\"{fit}>{}</text>",
        f.left,
        f.h - 8.0,
        esc(CHART_CAUTION)
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn probabilities_format_from_their_logarithm() {
        assert_eq!(fmt_prob(Some(0.5f64.ln())), "0.5");
        assert_eq!(fmt_prob(Some(0.005486372913604569f64.ln())), "0.005486");
        assert_eq!(fmt_prob(Some(3.2593296e-6f64.ln())), "3.259e-6");
        assert_eq!(fmt_prob(Some(-800.0 * LN_10)), "1e-800");
        assert_eq!(fmt_prob(Some(0.99999f64.ln())), "1");
        assert_eq!(fmt_prob(None), "0");
    }
}
