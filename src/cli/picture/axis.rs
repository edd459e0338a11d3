//! Axes shared by the file and terminal pictures: a log axis for ratios and a linear one,
//! each mapping a value to a fraction of its length, with readable ticks.

/// A log-scaled axis from `lo` to `hi` (both > 0).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LogAxis {
    pub lo: f64,
    pub hi: f64,
}

impl LogAxis {
    /// An axis that shows 1 and every value in `values`, padded by 15% on each side (in ratio).
    pub fn spanning(values: impl IntoIterator<Item = f64>) -> LogAxis {
        let (mut lo, mut hi) = (1.0f64, 1.0f64);
        for v in values.into_iter().filter(|v| v.is_finite() && *v > 0.0) {
            lo = lo.min(v);
            hi = hi.max(v);
        }
        LogAxis {
            lo: lo / 1.15,
            hi: hi * 1.15,
        }
    }

    /// Where `v` falls, 0 at `lo` and 1 at `hi` (outside [0, 1] when off the axis).
    pub fn fraction(&self, v: f64) -> f64 {
        (v.ln() - self.lo.ln()) / (self.hi.ln() - self.lo.ln())
    }

    /// Ticks from the 1-2-5 series inside the axis; powers of ten alone when that gives more
    /// than nine, and finer steps (1-1.5-2-3-5-7, then tenths) while it gives fewer than four.
    pub fn ticks(&self) -> Vec<f64> {
        let series = |steps: &[f64]| -> Vec<f64> {
            let mut out = Vec::new();
            let first = self.lo.log10().floor() as i32;
            let last = self.hi.log10().ceil() as i32;
            for e in first..=last {
                for s in steps {
                    let t = s * 10f64.powi(e);
                    if t >= self.lo && t <= self.hi {
                        out.push(t);
                    }
                }
            }
            out
        };
        let fine = series(&[1.0, 2.0, 5.0]);
        if fine.len() > 9 {
            series(&[1.0])
        } else if fine.len() < 4 {
            let finer = series(&[1.0, 1.5, 2.0, 3.0, 5.0, 7.0]);
            if finer.len() < 4 {
                series(&[1.0, 1.2, 1.4, 1.6, 1.8, 2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0])
            } else {
                finer
            }
        } else {
            fine
        }
    }
}

/// A linear axis from `lo` to `hi`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LinearAxis {
    pub lo: f64,
    pub hi: f64,
}

impl LinearAxis {
    pub fn fraction(&self, v: f64) -> f64 {
        (v - self.lo) / (self.hi - self.lo)
    }

    /// About five ticks at 1, 2 or 5 times a power of ten.
    pub fn ticks(&self) -> Vec<f64> {
        let span = self.hi - self.lo;
        if !(span > 0.0) {
            return vec![self.lo];
        }
        let raw = span / 5.0;
        let p = 10f64.powf(raw.log10().floor());
        let step = [1.0, 2.0, 5.0, 10.0]
            .iter()
            .map(|m| m * p)
            .find(|s| *s >= raw)
            .unwrap_or(10.0 * p);
        let mut t = (self.lo / step).ceil() * step;
        let mut out = Vec::new();
        while t <= self.hi + step * 1e-9 {
            out.push(if t.abs() < step * 1e-9 { 0.0 } else { t });
            t += step;
        }
        out
    }
}

/// A number in three significant digits, without trailing zeros.
pub fn short(v: f64) -> String {
    crate::cli::output::format_number(v, 3)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_ticks_are_readable_and_inside() {
        let a = LogAxis { lo: 0.4, hi: 6.0 };
        assert_eq!(a.ticks(), vec![0.5, 1.0, 2.0, 5.0]);
        assert!((a.fraction(1.0) - (0.4f64.ln().abs() / (6.0f64 / 0.4).ln())).abs() < 1e-15);
        let wide = LogAxis { lo: 1e-3, hi: 1e4 };
        assert_eq!(wide.ticks().len(), 8);
        assert_eq!(LinearAxis { lo: 0.0, hi: 1234.0 }.ticks(), vec![0.0, 500.0, 1000.0]);
    }
}
