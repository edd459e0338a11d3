//! Forest plot: one line per row, a mark at the estimate, its interval, a reference line at 1,
//! a log axis; the value and interval as text beside each row. Rows keep the query's order; a
//! row without an estimate shows its note instead of a mark; an interval that runs off the
//! axis ends in an arrow.

use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use super::axis::{LogAxis, short};
use super::select::{ForestData, ForestRow};
use super::{CHAR_WIDTH, FONT, FONT_SIZE, Glyphs, INK, MUTED};

/// Most rows a picture holds (files and terminal alike).
pub const MAX_ROWS: usize = 60;
/// A row's height in the file picture, in pixels.
const ROW: i32 = 24;
const TOP: i32 = 64;

/// A forest plot ready to draw.
#[derive(Debug, Clone)]
pub struct Forest {
    pub rows: Vec<ForestRow>,
    pub level: f64,
    /// Whether the level was read from the result (otherwise it is the default, and the title
    /// says so).
    pub level_known: bool,
    /// Rows left out beyond [`MAX_ROWS`].
    pub left_out: usize,
    pub axis: LogAxis,
}

impl Forest {
    /// `level` (given by the user) wins over the result's own level.
    pub fn new(data: ForestData, level: Option<f64>) -> Forest {
        let total = data.rows.len();
        let rows: Vec<ForestRow> = data.rows.into_iter().take(MAX_ROWS).collect();
        // Estimates always fit; limits stretch the axis at most 50-fold beyond an estimate.
        let axis = LogAxis::spanning(rows.iter().flat_map(|r| {
            let e = r.estimate;
            let cap = |v: Option<f64>, f: fn(f64, f64) -> f64, k: f64| match (v, e) {
                (Some(v), Some(e)) => Some(f(v, e * k)),
                (v, None) => v,
                (None, _) => None,
            };
            [e, cap(r.low, f64::max, 1.0 / 50.0), cap(r.high, f64::min, 50.0)]
                .into_iter()
                .flatten()
        }));
        Forest {
            left_out: total - rows.len(),
            rows,
            level: level.or(data.level).unwrap_or(0.95),
            level_known: level.is_some() || data.level.is_some(),
            axis,
        }
    }

    pub fn title(&self) -> String {
        let pct = short(self.level * 100.0);
        if self.level_known {
            format!("Rate ratios with {pct}% intervals")
        } else {
            format!("Rate ratios with intervals (level not in the result: {pct}% assumed; give level=...)")
        }
    }

    /// The text beside a row: the value and interval, or why there is none.
    pub fn value_text(row: &ForestRow) -> String {
        match (row.estimate, row.low, row.high) {
            (Some(e), l, h) => {
                let side = |v: Option<f64>| v.map_or("∞".to_string(), short);
                let mut s = format!("{} ({} to {})", short(e), l.map_or("0".to_string(), short), side(h));
                if let Some(n) = &row.note {
                    s.push_str(&format!(" [{n}]"));
                }
                s
            }
            (None, _, _) => row.note.clone().unwrap_or_else(|| "no estimate".to_string()),
        }
    }

    /// A line saying how many rows were left out, if any.
    pub fn left_out_note(&self) -> Option<String> {
        (self.left_out > 0).then(|| {
            format!(
                "drew the first {MAX_ROWS} of {} rows; choose which with WHERE or LIMIT",
                self.rows.len() + self.left_out
            )
        })
    }

    /// Pixel layout of the file picture.
    fn layout(&self) -> Layout {
        let chars = |s: &str| s.chars().count() as f64;
        let label_w = 24 + (self.rows.iter().map(|r| chars(&r.label)).fold(0.0, f64::max) * CHAR_WIDTH) as i32;
        let value_w = 24
            + (self
                .rows
                .iter()
                .map(|r| chars(&Self::value_text(r)))
                .fold(0.0, f64::max)
                * CHAR_WIDTH) as i32;
        let title_w = 32 + (chars(&self.title()) * CHAR_WIDTH * 16.0 / FONT_SIZE) as i32;
        let plot_w = 420.max(title_w - label_w - value_w);
        let notes = i32::from(self.left_out > 0);
        Layout {
            plot_left: label_w,
            plot_right: label_w + plot_w,
            width: label_w + plot_w + value_w,
            height: TOP + ROW * self.rows.len() as i32 + 56 + 20 * notes,
        }
    }

    /// The x pixel of value `v` (may lie outside the plot).
    fn x(&self, l: &Layout, v: f64) -> i32 {
        l.plot_left + (self.axis.fraction(v) * (l.plot_right - l.plot_left) as f64).round() as i32
    }

    /// The y pixel of row `i`'s centre line.
    pub fn row_y(i: usize) -> i32 {
        TOP + ROW * i as i32 + ROW / 2
    }

    /// The picture as SVG text (drawn with plotters' SVG backend).
    pub fn svg(&self) -> Result<String, String> {
        let l = self.layout();
        let mut out = String::new();
        {
            let root = SVGBackend::with_string(&mut out, (l.width as u32, l.height as u32)).into_drawing_area();
            self.draw(&root, &l)
                .map_err(|e| format!("drawing the forest plot: {e}"))?;
            root.present().map_err(|e| format!("drawing the forest plot: {e}"))?;
        }
        Ok(out)
    }

    fn draw<DB: DrawingBackend>(
        &self,
        root: &DrawingArea<DB, plotters::coord::Shift>,
        l: &Layout,
    ) -> Result<(), DrawingAreaErrorKind<DB::ErrorType>> {
        root.fill(&WHITE)?;
        let text = TextStyle::from((FONT, FONT_SIZE).into_font()).color(&INK);
        let muted = TextStyle::from((FONT, FONT_SIZE).into_font()).color(&MUTED);
        let left = |s: TextStyle<'static>| s.pos(Pos::new(HPos::Left, VPos::Center));
        root.draw(&Text::new(
            self.title(),
            (16, 28),
            TextStyle::from((FONT, 16.0).into_font()).color(&INK),
        ))?;
        let bottom = TOP + ROW * self.rows.len() as i32;
        let x1 = self.x(l, 1.0);
        root.draw(&PathElement::new(
            vec![(x1, TOP - 8), (x1, bottom)],
            MUTED.stroke_width(1),
        ))?;
        let line = INK.stroke_width(2);
        for (i, row) in self.rows.iter().enumerate() {
            let y = Self::row_y(i);
            root.draw(&Text::new(row.label.clone(), (12, y), left(text.clone())))?;
            let value_style = if row.estimate.is_some() {
                text.clone()
            } else {
                muted.clone()
            };
            root.draw(&Text::new(
                Self::value_text(row),
                (l.plot_right + 16, y),
                left(value_style),
            ))?;
            if row.estimate.is_none() && row.low.is_none() && row.high.is_none() {
                continue;
            }
            // A missing limit (an infinite side) runs off the axis.
            let lo = row.low.or(row.estimate).unwrap_or(self.axis.lo / 2.0);
            let hi = row.high.or(row.estimate).unwrap_or(self.axis.hi * 2.0);
            let (a, b) = (self.x(l, lo).max(l.plot_left), self.x(l, hi).min(l.plot_right));
            if row.low.is_some() || row.high.is_some() {
                root.draw(&PathElement::new(vec![(a, y), (b, y)], line))?;
            }
            if row.low.is_none() || self.x(l, lo) < l.plot_left {
                root.draw(&Polygon::new(vec![(a - 8, y), (a, y - 5), (a, y + 5)], INK.filled()))?;
            }
            if row.high.is_none() || self.x(l, hi) > l.plot_right {
                root.draw(&Polygon::new(vec![(b + 8, y), (b, y - 5), (b, y + 5)], INK.filled()))?;
            }
            if let Some(e) = row.estimate {
                root.draw(&Circle::new((self.x(l, e), y), 5, INK.filled()))?;
            }
        }
        // The axis: a rule, ticks and their labels.
        let axis_y = bottom + 6;
        root.draw(&PathElement::new(
            vec![(l.plot_left, axis_y), (l.plot_right, axis_y)],
            INK.stroke_width(1),
        ))?;
        let centred = muted.clone().pos(Pos::new(HPos::Center, VPos::Top));
        for t in self.axis.ticks() {
            let x = self.x(l, t);
            root.draw(&PathElement::new(
                vec![(x, axis_y), (x, axis_y + 5)],
                INK.stroke_width(1),
            ))?;
            root.draw(&Text::new(short(t), (x, axis_y + 8), centred.clone()))?;
        }
        let caption = "rate ratio (log scale); the line marks 1";
        root.draw(&Text::new(
            caption,
            ((l.plot_left + l.plot_right) / 2, axis_y + 26),
            centred.clone(),
        ))?;
        if let Some(note) = self.left_out_note() {
            root.draw(&Text::new(note, (12, axis_y + 46), left(muted.clone())))?;
        }
        Ok(())
    }

    /// The picture as text, `width` characters wide.
    pub fn text(&self, width: usize, g: &Glyphs) -> String {
        let width = width.max(40);
        let values: Vec<String> = self.rows.iter().map(Self::value_text).collect();
        let label_w = self
            .rows
            .iter()
            .map(|r| r.label.chars().count())
            .max()
            .unwrap_or(0)
            .min(width / 3);
        // The values keep their full text while the bar keeps at least 24 columns.
        let value_w = values
            .iter()
            .map(|v| v.chars().count())
            .max()
            .unwrap_or(0)
            .min(width.saturating_sub(label_w + 4 + 24));
        let bar_w = width.saturating_sub(label_w + value_w + 4).max(16);
        let col = |v: f64| -> isize { (self.axis.fraction(v) * (bar_w - 1) as f64).round() as isize };
        let mut out = format!("{}\n\n", self.title());
        let one = col(1.0);
        for (row, value) in self.rows.iter().zip(&values) {
            let mut bar: Vec<char> = vec![' '; bar_w];
            if (0..bar_w as isize).contains(&one) {
                bar[one as usize] = g.reference;
            }
            if row.estimate.is_some() || row.low.is_some() || row.high.is_some() {
                let lo = row.low.or(row.estimate).unwrap_or(self.axis.lo / 2.0);
                let hi = row.high.or(row.estimate).unwrap_or(self.axis.hi * 2.0);
                let (a, b) = (col(lo), col(hi));
                let last = bar_w as isize - 1;
                let (from, to) = (a.clamp(0, last) as usize, b.clamp(0, last) as usize);
                let (from, to) = (from.min(to), to.max(from));
                for c in bar.iter_mut().take(to + 1).skip(from) {
                    *c = g.interval;
                }
                if a < 0 || row.low.is_none() {
                    bar[from] = g.left_arrow;
                }
                if b >= bar_w as isize || row.high.is_none() {
                    bar[to] = g.right_arrow;
                }
                if let Some(e) = row.estimate {
                    let c = col(e);
                    if (0..bar_w as isize).contains(&c) {
                        bar[c as usize] = g.mark;
                    }
                }
            }
            out.push_str(&format!(
                "{}  {}  {}\n",
                pad(&row.label, label_w),
                bar.iter().collect::<String>(),
                fit(value, value_w)
            ));
        }
        // Axis rule with tick marks, then tick labels where they do not overlap.
        let mut rule: Vec<char> = vec![g.rule; bar_w];
        let mut labels: Vec<char> = vec![' '; bar_w + 8];
        let mut free_from = 0usize;
        for t in self.axis.ticks() {
            let c = col(t).clamp(0, bar_w as isize - 1) as usize;
            rule[c] = g.tick;
            let s = short(t);
            let start = c.saturating_sub(s.chars().count() / 2);
            if start >= free_from && start + s.len() <= labels.len() {
                for (k, ch) in s.chars().enumerate() {
                    labels[start + k] = ch;
                }
                free_from = start + s.len() + 1;
            }
        }
        let indent = " ".repeat(label_w + 2);
        out.push_str(&format!("{indent}{}\n", rule.iter().collect::<String>()));
        out.push_str(&format!("{indent}{}\n", labels.iter().collect::<String>().trim_end()));
        out.push_str(&format!("{indent}rate ratio (log scale); {} marks 1\n", g.reference));
        if let Some(note) = self.left_out_note() {
            out.push_str(&format!("{note}\n"));
        }
        out
    }
}

/// Pixel positions of the file picture.
struct Layout {
    plot_left: i32,
    plot_right: i32,
    width: i32,
    height: i32,
}

/// `s` padded with spaces to `w` characters, or cut with an ellipsis.
pub fn pad(s: &str, w: usize) -> String {
    let f = fit(s, w);
    format!("{f}{}", " ".repeat(w.saturating_sub(f.chars().count())))
}

/// `s` cut to `w` characters with an ellipsis when longer.
pub fn fit(s: &str, w: usize) -> String {
    if s.chars().count() <= w {
        s.to_string()
    } else {
        let mut t: String = s.chars().take(w.saturating_sub(1)).collect();
        t.push('…');
        t
    }
}
