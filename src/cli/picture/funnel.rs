//! Funnel plot of observed/expected per area: x = expected count, y = O/E, the line at 1 and
//! control limits at two levels, each the Poisson(E) quantile of the null hypothesis with
//! Spiegelhalter's interpolation, divided by E (`glm::standardize::funnel_limit`, the same
//! Poisson tails as `standardized_ratio`'s exact p-value). They are limits for where an
//! area's ratio would fall by chance alone, not confidence intervals around an area's ratio.
//! With `widen`, the limits are stretched around 1 by sqrt(φ), φ estimated from the areas
//! (`funnel_overdispersion`), when φ > 1.

use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use super::axis::{LinearAxis, short};
use super::forest::pad;
use super::select::FunnelPoint;
use super::{CHAR_WIDTH, FONT, FONT_SIZE, Glyphs, INK, MUTED, SOFT};
use crate::glm::standardize::{funnel_limit, funnel_overdispersion};

/// The two limit levels: inner and outer.
pub const LEVELS: [f64; 2] = [0.95, 0.998];

/// A funnel plot ready to draw.
#[derive(Debug, Clone)]
pub struct Funnel {
    pub points: Vec<FunnelPoint>,
    /// The overdispersion factor applied to the limits (1 when not widened).
    pub phi: f64,
    /// Whether widening was asked for.
    pub widened: bool,
    pub x: LinearAxis,
    pub y: LinearAxis,
}

impl Funnel {
    pub fn new(points: Vec<FunnelPoint>, widen: bool) -> Funnel {
        let phi = if widen {
            let pairs: Vec<(f64, f64)> = points.iter().map(|p| (p.observed, p.expected)).collect();
            funnel_overdispersion(&pairs).unwrap_or(1.0).max(1.0)
        } else {
            1.0
        };
        let max_e = points.iter().map(|p| p.expected).fold(0.0, f64::max);
        let min_e = points.iter().map(|p| p.expected).fold(f64::INFINITY, f64::min);
        let x = LinearAxis {
            lo: 0.0,
            hi: max_e * 1.08,
        };
        let mut f = Funnel {
            points,
            phi,
            widened: widen,
            x,
            y: LinearAxis { lo: 0.0, hi: 2.0 },
        };
        // The y axis shows every ratio and the limits from the smallest area's E onwards.
        let edge = (min_e * 0.8).max(max_e / 200.0);
        let mut lo = f.limit(edge, (1.0 - LEVELS[1]) / 2.0).min(1.0);
        let mut hi = f.limit(edge, (1.0 + LEVELS[1]) / 2.0).max(1.0);
        for p in &f.points {
            lo = lo.min(p.observed / p.expected);
            hi = hi.max(p.observed / p.expected);
        }
        let pad = (hi - lo) * 0.06;
        f.y = LinearAxis {
            lo: (lo - pad).max(0.0),
            hi: hi + pad,
        };
        f
    }

    /// The limit at tail probability `p` for expected count `e`, widened when asked.
    pub fn limit(&self, e: f64, p: f64) -> f64 {
        1.0 + (funnel_limit(e, p) - 1.0) * self.phi.sqrt()
    }

    pub fn title(&self) -> String {
        let mut t = "Observed / expected by expected count, with 95% and 99.8% limits".to_string();
        if self.widened {
            t.push_str(&format!(" (widened for overdispersion, phi = {})", short(self.phi)));
        }
        t
    }

    /// Areas outside the outer limits, as lines of text.
    pub fn outside(&self) -> Vec<String> {
        let (lo, hi) = ((1.0 - LEVELS[1]) / 2.0, (1.0 + LEVELS[1]) / 2.0);
        self.points
            .iter()
            .filter_map(|p| {
                let r = p.observed / p.expected;
                let side = if r > self.limit(p.expected, hi) {
                    "above"
                } else if r < self.limit(p.expected, lo) {
                    "below"
                } else {
                    return None;
                };
                Some(format!(
                    "{}: {} ({} observed, {} expected), {side} the 99.8% limits",
                    p.label,
                    short(r),
                    short(p.observed),
                    short(p.expected)
                ))
            })
            .collect()
    }

    /// Points along the x axis where the limit curves are evaluated.
    fn grid(&self) -> Vec<f64> {
        let start = (self.x.hi / 400.0).max(0.5);
        (0..=200)
            .map(|k| start + (self.x.hi - start) * k as f64 / 200.0)
            .collect()
    }

    /// The picture as SVG text, drawn with plotters' chart builder.
    pub fn svg(&self) -> Result<String, String> {
        let outside = self.outside();
        let notes = if outside.is_empty() {
            0
        } else {
            44 + 20 * outside.len() as u32
        };
        let (w, h) = (960u32, 620 + notes);
        let mut out = String::new();
        {
            let root = SVGBackend::with_string(&mut out, (w, h)).into_drawing_area();
            self.draw(&root, &outside)
                .map_err(|e| format!("drawing the funnel plot: {e}"))?;
            root.present().map_err(|e| format!("drawing the funnel plot: {e}"))?;
        }
        Ok(out)
    }

    fn draw<DB: DrawingBackend>(
        &self,
        root: &DrawingArea<DB, plotters::coord::Shift>,
        outside: &[String],
    ) -> Result<(), DrawingAreaErrorKind<DB::ErrorType>> {
        root.fill(&WHITE)?;
        let (chart_area, notes) = root.split_vertically(620);
        let mut chart = ChartBuilder::on(&chart_area)
            .caption(self.title(), (FONT, 16.0).into_font().color(&INK))
            .margin(16)
            .x_label_area_size(44)
            .y_label_area_size(64)
            .build_cartesian_2d(self.x.lo..self.x.hi, self.y.lo..self.y.hi)?;
        chart
            .configure_mesh()
            .disable_mesh()
            .x_desc("expected count")
            .y_desc("observed / expected")
            .label_style((FONT, FONT_SIZE).into_font().color(&INK))
            .axis_desc_style((FONT, FONT_SIZE).into_font().color(&INK))
            .x_label_formatter(&|v| short(*v))
            .y_label_formatter(&|v| short(*v))
            .draw()?;
        chart.draw_series(LineSeries::new(
            [(self.x.lo, 1.0), (self.x.hi, 1.0)],
            MUTED.stroke_width(1),
        ))?;
        let grid = self.grid();
        for (level, color) in [(LEVELS[0], SOFT), (LEVELS[1], INK)] {
            for p in [(1.0 - level) / 2.0, (1.0 + level) / 2.0] {
                let curve: Vec<(f64, f64)> = grid
                    .iter()
                    .map(|&e| (e, self.limit(e, p)))
                    .filter(|(_, v)| *v >= self.y.lo && *v <= self.y.hi)
                    .collect();
                chart.draw_series(LineSeries::new(curve, color.stroke_width(1)))?;
            }
        }
        // Points, then labels placed beside them without overlapping each other or leaving the
        // picture: to the right of the point, or to its left near the right edge, moved down a
        // line at a time while they would cover a label already placed.
        for p in &self.points {
            chart.draw_series(std::iter::once(Circle::new(
                (p.expected, p.observed / p.expected),
                4,
                INK.filled(),
            )))?;
        }
        let (plot_x, _) = chart.plotting_area().get_pixel_range();
        let mut placed: Vec<(i32, i32, i32, i32)> = Vec::new();
        let mut order: Vec<&FunnelPoint> = self.points.iter().collect();
        order.sort_by(|a, b| (b.observed / b.expected).total_cmp(&(a.observed / a.expected)));
        for p in order {
            let (px, py) = chart.backend_coord(&(p.expected, p.observed / p.expected));
            let w = (p.label.chars().count() as f64 * CHAR_WIDTH * (FONT_SIZE - 1.0) / FONT_SIZE) as i32;
            let right_side = px + 8 + w <= plot_x.end;
            let x0 = if right_side { px + 8 } else { px - 8 - w };
            let mut y = py;
            let overlaps = |y: i32, placed: &[(i32, i32, i32, i32)]| {
                placed
                    .iter()
                    .any(|&(a, b, c, d)| x0 < b && x0 + w > a && y - 7 < d && y + 7 > c)
            };
            for _ in 0..6 {
                if !overlaps(y, &placed) {
                    break;
                }
                y += 14;
            }
            placed.push((x0, x0 + w, y - 7, y + 7));
            let anchor = if right_side { HPos::Left } else { HPos::Right };
            let style = TextStyle::from((FONT, FONT_SIZE - 1.0).into_font())
                .color(&INK)
                .pos(Pos::new(anchor, VPos::Center));
            let x = if right_side { x0 } else { x0 + w };
            root.draw(&Text::new(p.label.clone(), (x, y), style))?;
        }
        let left = TextStyle::from((FONT, FONT_SIZE).into_font())
            .color(&INK)
            .pos(Pos::new(HPos::Left, VPos::Center));
        if !outside.is_empty() {
            notes.draw(&Text::new("Outside the 99.8% limits:", (16, 8), left.clone()))?;
            for (i, line) in outside.iter().enumerate() {
                notes.draw(&Text::new(line.clone(), (32, 28 + 20 * i as i32), left.clone()))?;
            }
        }
        Ok(())
    }

    /// The picture as text, `width` characters wide and about 22 lines high.
    pub fn text(&self, width: usize, g: &Glyphs) -> String {
        let plot_w = width.max(40) - 8;
        let plot_h = 20usize;
        let mut grid = vec![vec![' '; plot_w]; plot_h];
        let row = |v: f64| -> Option<usize> {
            let f = self.y.fraction(v);
            (0.0..=1.0)
                .contains(&f)
                .then(|| ((1.0 - f) * (plot_h - 1) as f64).round() as usize)
        };
        let col = |e: f64| -> usize {
            (self.x.fraction(e) * (plot_w - 1) as f64)
                .round()
                .clamp(0.0, (plot_w - 1) as f64) as usize
        };
        if let Some(r) = row(1.0) {
            grid[r].iter_mut().for_each(|c| *c = g.rule);
        }
        for c in 0..plot_w {
            let e = self.x.lo + (self.x.hi - self.x.lo) * c as f64 / (plot_w - 1) as f64;
            if e < 0.5 {
                continue;
            }
            for (level, mark) in [(LEVELS[0], g.inner), (LEVELS[1], g.outer)] {
                for p in [(1.0 - level) / 2.0, (1.0 + level) / 2.0] {
                    if let Some(r) = row(self.limit(e, p)) {
                        grid[r][c] = mark;
                    }
                }
            }
        }
        let keys: Vec<char> = ('a'..='z').chain('A'..='Z').collect();
        let mut legend = Vec::new();
        for (i, p) in self.points.iter().enumerate() {
            let key = keys.get(i).copied().unwrap_or('*');
            if let Some(r) = row(p.observed / p.expected) {
                grid[r][col(p.expected)] = key;
            }
            legend.push(format!(
                "{key} {} {}",
                pad(&p.label, 20),
                short(p.observed / p.expected)
            ));
        }
        let mut out = format!("{}\n\n", self.title());
        for (r, line) in grid.iter().enumerate() {
            let tick = if r == 0 {
                short(self.y.hi)
            } else if r == plot_h - 1 {
                short(self.y.lo)
            } else if row(1.0) == Some(r) {
                "1".to_string()
            } else {
                String::new()
            };
            out.push_str(&format!(
                "{tick:>6} {}{}\n",
                g.axis,
                line.iter().collect::<String>().trim_end()
            ));
        }
        out.push_str(&format!(
            "{:>6} {}{}\n",
            "",
            g.corner,
            g.rule.to_string().repeat(plot_w)
        ));
        let mut labels = vec![' '; plot_w + 8];
        let mut free_from = 0usize;
        for t in self.x.ticks() {
            let c = col(t);
            let s = short(t);
            let start = c.saturating_sub(s.len() / 2);
            if start >= free_from && start + s.len() <= labels.len() {
                for (k, ch) in s.chars().enumerate() {
                    labels[start + k] = ch;
                }
                free_from = start + s.len() + 1;
            }
        }
        out.push_str(&format!("{:>8}{}\n", "", labels.iter().collect::<String>().trim_end()));
        out.push_str(&format!(
            "{:>8}expected count; {} 95% limits, {} 99.8% limits, {} ratio 1\n\n",
            "", g.inner, g.outer, g.rule
        ));
        for chunk in legend.chunks(2) {
            out.push_str(&format!("  {}\n", chunk.join("    ")));
        }
        let outside = self.outside();
        if !outside.is_empty() {
            out.push_str("\nOutside the 99.8% limits:\n");
            for line in outside {
                out.push_str(&format!("  {line}\n"));
            }
        }
        out
    }
}
