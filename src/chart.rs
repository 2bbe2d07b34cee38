//! SVG pictures of the law of the count: the exact pmf as bars, the tail asked about shaded, the threshold
//! marked and approximations overlaid as lines, on a linear or a logarithmic probability axis.
//!
//! Pure rendering: the caller computes the probabilities (as natural logarithms, so that values below the f64
//! range still plot on the log axis) and this module only turns them into markup. Output depends on nothing
//! but the input (fixed number formatting, no clock, no randomness), so the same request always gives the same
//! bytes. The choice of counts to plot lives here too ([`plot_counts`]); the explorer page applies the same rule.

use crate::engine::{MethodId, Side};
use std::f64::consts::LN_10;
use std::fmt::Write;

/// Most bars drawn: beyond this the counts are sampled with a stride.
pub const MAX_POINTS: u64 = 300;

/// Standard deviations either side of the mean that the plot covers (before the threshold is added).
pub const SPREAD_SD: f64 = 6.0;

/// The counts to plot, in increasing order, and the stride between them.
///
/// The bulk mean +- 6 sd (clipped to the support) decides the stride, so that it fits in [`MAX_POINTS`] bars;
/// the threshold (clamped to the support) is always one of the counts. A threshold far outside the bulk moves
/// the window to the threshold rather than stretching the stride, since the bulk would then be a few pixels
/// wide anyway; the window keeps a fifth of its width on the far side of the threshold.
pub fn plot_counts(
    mean: f64,
    sd: f64,
    support_min: u64,
    support_max: Option<u64>,
    threshold: u64,
    side: Side,
) -> (Vec<u64>, u64) {
    let max = support_max.unwrap_or(u64::MAX);
    let clip = |x: f64| -> u64 {
        if x.is_nan() || x <= support_min as f64 {
            support_min
        } else if x >= max as f64 {
            max
        } else {
            x as u64
        }
    };
    let bulk_lo = clip((mean - SPREAD_SD * sd).floor());
    let bulk_hi = clip((mean + SPREAD_SD * sd).ceil()).max(bulk_lo);
    let k = threshold.clamp(support_min, max);
    let stride = (bulk_hi - bulk_lo) / MAX_POINTS + 1;
    let (mut lo, mut hi) = (bulk_lo.min(k), bulk_hi.max(k));
    // Show some of the tail beyond a threshold at the edge of the bulk, not just its first bar.
    let ext = ((bulk_hi - bulk_lo) / 8).max(3 * stride);
    match side {
        Side::Upper => hi = hi.max(k.saturating_add(ext).min(max)),
        Side::Lower => lo = lo.min(k.saturating_sub(ext).max(support_min)),
        Side::Point => {}
    }
    let span = (MAX_POINTS - 1) * stride;
    if hi - lo > span {
        let margin = span / 5;
        if k > bulk_hi {
            hi = k.saturating_add(margin).min(max);
            lo = hi.saturating_sub(span).max(support_min);
        } else {
            lo = k.saturating_sub(margin).max(support_min);
            hi = lo.saturating_add(span).min(max);
        }
    }
    // Grid points k + j * stride inside [lo, hi].
    let first = k - (k - lo) / stride * stride;
    let mut counts = Vec::new();
    let mut c = first;
    while c <= hi {
        counts.push(c);
        match c.checked_add(stride) {
            Some(n) => c = n,
            None => break,
        }
    }
    (counts, stride)
}

/// One approximation drawn as a line: ln P(S = k) at each plotted count (None where it is 0).
pub struct Overlay<'a> {
    pub method: MethodId,
    pub ln: &'a [Option<f64>],
}

/// Everything one picture shows.
pub struct Chart<'a> {
    pub counts: &'a [u64],
    pub stride: u64,
    /// Exact ln P(S = k) at each count (None where P = 0).
    pub exact_ln: &'a [Option<f64>],
    pub overlays: Vec<Overlay<'a>>,
    pub threshold: u64,
    pub side: Side,
    /// Exact ln of the probability asked about (the shaded tail), for the title.
    pub tail_ln: Option<f64>,
    pub exposures: u64,
    pub mean: f64,
    pub sd: f64,
    pub log_scale: bool,
    pub width: u32,
    pub height: u32,
}

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

/// Render the picture.
pub fn render(c: &Chart) -> String {
    let w = c.width as f64;
    let h = c.height as f64;
    let n = c.counts.len().max(1);
    let legend_h = 22.0;
    let (left, right, top, bottom) = (74.0, 18.0, 54.0, 52.0 + legend_h);
    let pw = (w - left - right).max(10.0);
    let ph = (h - top - bottom).max(10.0);
    let slot = pw / n as f64;
    let x_of = |i: usize| left + slot * (i as f64 + 0.5);

    // Vertical scale: in log10 units on the log axis, in probability on the linear one.
    let all_ln = c.exact_ln.iter().chain(c.overlays.iter().flat_map(|o| o.ln.iter())).filter_map(|v| *v);
    let exact_l10 = || c.exact_ln.iter().filter_map(|v| *v).map(|l| l / LN_10);
    let (y_lo, y_hi, ticks): (f64, f64, Vec<(f64, String)>) = if c.log_scale {
        let hi_l = all_ln.fold(f64::NEG_INFINITY, f64::max) / LN_10;
        let lo_l = exact_l10().fold(f64::INFINITY, f64::min);
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
    };
    let y_of = |ln: f64| -> f64 {
        let v = if c.log_scale { ln / LN_10 } else { ln.exp() };
        let f = ((v - y_lo) / (y_hi - y_lo)).clamp(-0.05, 1.05);
        top + ph * (1.0 - f)
    };
    let base_y = top + ph;

    let mut s = String::with_capacity(8192 + 120 * n);
    let title = format!("{} = {}", side_label(c.side, c.threshold), fmt_prob(c.tail_ln));
    let subtitle = format!(
        "{} exposures \u{b7} mean {} \u{b7} sd {}{}",
        fmt_count(c.exposures),
        fmt_real(c.mean, 5),
        fmt_real(c.sd, 4),
        if c.stride > 1 { format!(" \u{b7} every {}th count plotted", c.stride) } else { String::new() }
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

    // Tail region: one band over the counts in the tail.
    let tail_idx: Vec<usize> = (0..c.counts.len()).filter(|&i| in_tail(c.side, c.counts[i], c.threshold)).collect();
    if let (Some(&a), Some(&b)) = (tail_idx.first(), tail_idx.last()) {
        let x0 = left + slot * a as f64;
        let x1 = left + slot * (b + 1) as f64;
        let _ = writeln!(
            s,
            "<rect class=\"tail-region\" x=\"{x0:.2}\" y=\"{top}\" width=\"{:.2}\" height=\"{ph:.2}\" fill=\"{TAIL_FILL}\" fill-opacity=\"0.55\"/>",
            x1 - x0
        );
    }

    // Grid and y ticks.
    let _ = writeln!(s, "<g class=\"y-axis\" font-size=\"11\" fill=\"{MUTED}\">");
    for (v, label) in &ticks {
        let y = top + ph * (1.0 - (v - y_lo) / (y_hi - y_lo));
        let _ = writeln!(
            s,
            "<line x1=\"{left}\" x2=\"{:.2}\" y1=\"{y:.2}\" y2=\"{y:.2}\" stroke=\"{GRID}\" stroke-width=\"1\"/>",
            left + pw
        );
        if c.log_scale {
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

    // Bars.
    let bar_w = if slot > 3.0 { slot * 0.82 } else { slot };
    let mut plain = String::new();
    let mut tail = String::new();
    for (i, v) in c.exact_ln.iter().enumerate() {
        let Some(l) = v else { continue };
        let y = y_of(*l);
        if base_y - y < 0.05 {
            continue;
        }
        let x = x_of(i) - bar_w / 2.0;
        let target = if in_tail(c.side, c.counts[i], c.threshold) { &mut tail } else { &mut plain };
        let _ = write!(target, "M{x:.2} {base_y:.2}V{y:.2}h{bar_w:.2}V{base_y:.2}Z");
    }
    let _ = writeln!(s, "<path class=\"bars\" d=\"{plain}\" fill=\"{BAR}\"/>");
    let _ = writeln!(s, "<path class=\"tail-bars\" d=\"{tail}\" fill=\"{TAIL_BAR}\"/>");

    // Overlays, clipped to the plot; a gap where a method gives 0.
    for o in &c.overlays {
        let (col, dash) = overlay_style(o.method);
        let mut d = String::new();
        let mut pen_down = false;
        for (i, v) in o.ln.iter().enumerate() {
            match v {
                Some(l) => {
                    let _ = write!(d, "{}{:.2} {:.2}", if pen_down { "L" } else { "M" }, x_of(i), y_of(*l));
                    pen_down = true;
                }
                None => pen_down = false,
            }
        }
        let dash_attr = if dash.is_empty() { String::new() } else { format!(" stroke-dasharray=\"{dash}\"") };
        let _ = writeln!(
            s,
            "<path class=\"overlay overlay-{}\" d=\"{d}\" fill=\"none\" stroke=\"{col}\" stroke-width=\"2\"{dash_attr} clip-path=\"url(#plot-area)\"/>",
            method_name(o.method)
        );
    }

    // Threshold marker.
    if let Some(i) = c.counts.iter().position(|&k| k == c.threshold).or_else(|| {
        // Outside the support: mark the nearest edge.
        if c.threshold < *c.counts.first()? {
            Some(0)
        } else {
            Some(c.counts.len() - 1)
        }
    }) {
        let x = x_of(i);
        let _ = writeln!(
            s,
            "<g class=\"threshold\"><line x1=\"{x:.2}\" x2=\"{x:.2}\" y1=\"{:.2}\" y2=\"{base_y:.2}\" stroke=\"{INK}\" stroke-width=\"1.5\" stroke-dasharray=\"4 3\"/>\
             <text x=\"{x:.2}\" y=\"{:.2}\" font-size=\"11\" text-anchor=\"middle\" fill=\"{INK}\">k = {}</text></g>",
            top - 2.0,
            top - 5.0,
            fmt_count(c.threshold)
        );
    }

    // Axes and x ticks.
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
    let _ = writeln!(
        s,
        "<text class=\"x-label\" x=\"{:.2}\" y=\"{:.2}\" font-size=\"12\" text-anchor=\"middle\" fill=\"{INK}\">number of events k</text>",
        left + pw / 2.0,
        base_y + 34.0
    );
    let ylab = if c.log_scale { "P(S = k), log scale" } else { "P(S = k)" };
    let _ = writeln!(
        s,
        "<text class=\"y-label\" transform=\"translate(16 {:.2}) rotate(-90)\" font-size=\"12\" text-anchor=\"middle\" fill=\"{INK}\">{ylab}</text>",
        top + ph / 2.0
    );

    // Legend.
    let ly = h - 14.0;
    let mut lx = left;
    let _ = writeln!(s, "<g class=\"legend\" font-size=\"11.5\" fill=\"{INK}\">");
    // (colour, dash, is a bar) per entry.
    let tail_label = format!("tail {}", side_label(c.side, c.threshold));
    let mut entries: Vec<(&str, &str, bool, &str)> = vec![(BAR, "", true, "exact"), (TAIL_BAR, "", true, &tail_label)];
    for o in &c.overlays {
        let (col, dash) = overlay_style(o.method);
        entries.push((col, dash, false, method_name(o.method)));
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
    s.push_str("</g>\n</svg>\n");
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn plot_counts_cover_the_bulk_and_the_threshold() {
        let up = Side::Upper;
        let (c, s) = plot_counts(85.5, 9.1, 0, None, 110, up);
        assert_eq!(s, 1);
        assert_eq!((c[0], *c.last().unwrap()), (30, 141));
        // A threshold beyond the bulk is included with some of its tail; a far one moves the window.
        let (c, _) = plot_counts(85.5, 9.1, 0, None, 200, up);
        assert!(c.contains(&200) && c[0] == 30 && *c.last().unwrap() == 213);
        let (c, _) = plot_counts(85.5, 9.1, 0, None, 20, Side::Lower);
        assert!(c[0] == 7 && *c.last().unwrap() == 141);
        let (c, s) = plot_counts(85.5, 9.1, 0, None, 5000, up);
        assert_eq!(s, 1);
        assert!(c.contains(&5000) && c.len() as u64 == MAX_POINTS);
        // Clipped to the support, a threshold above it clamped onto its edge.
        let (c, _) = plot_counts(0.6, 0.68, 0, Some(3), 9, up);
        assert_eq!(c, vec![0, 1, 2, 3]);
        // A wide law is sampled with a stride that keeps the threshold on the grid.
        let (c, s) = plot_counts(1e6, 1e3, 0, None, 1_000_123, Side::Point);
        assert!(s > 1 && c.len() as u64 <= MAX_POINTS && c.contains(&1_000_123));
        assert!(c.windows(2).all(|w| w[1] - w[0] == s));
    }

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
