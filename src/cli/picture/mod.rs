//! Pictures of a result: forest plots of rate ratios and funnel plots of observed/expected,
//! drawn in the terminal (Unicode, or plain ASCII where Unicode cannot be shown) or written as
//! SVG (plotters) or PNG (that SVG rasterised by resvg with a font shipped in a crate, so a
//! PNG looks the same on every machine; plotters' own bitmap text needs system fonts).
//!
//! A request names the kind (or lets the result's shape decide: observed and expected counts
//! make a funnel plot, estimates with intervals a forest plot), optionally the columns, a
//! file, `level=...` and, for funnels, `widen`.

pub mod axis;
pub mod forest;
pub mod funnel;
pub mod select;

use datafusion::arrow::array::RecordBatch;
use plotters::style::RGBColor;

use forest::Forest;
use funnel::Funnel;
use select::{Named, forest_rows, funnel_points};

/// The font family written into SVG: the shipped font first, then generic fallbacks.
pub(crate) const FONT: &str = "Hack, DejaVu Sans Mono, monospace";
pub(crate) const FONT_SIZE: f64 = 13.0;
/// Advance width of one character of the monospaced font at [`FONT_SIZE`], in pixels (0.6 em).
pub(crate) const CHAR_WIDTH: f64 = 0.602 * FONT_SIZE;
pub(crate) const INK: RGBColor = RGBColor(0x1d, 0x3b, 0x53);
pub(crate) const SOFT: RGBColor = RGBColor(0x7f, 0xa7, 0xc9);
pub(crate) const MUTED: RGBColor = RGBColor(0x8a, 0x8a, 0x8a);

/// Characters of the terminal pictures.
#[derive(Debug, Clone, Copy)]
pub struct Glyphs {
    pub mark: char,
    pub interval: char,
    pub reference: char,
    pub left_arrow: char,
    pub right_arrow: char,
    pub rule: char,
    pub tick: char,
    pub axis: char,
    pub corner: char,
    pub inner: char,
    pub outer: char,
    /// Whether text must be plain ASCII (other characters are replaced).
    pub ascii: bool,
}

pub const UNICODE: Glyphs = Glyphs {
    mark: '●',
    interval: '─',
    reference: '│',
    left_arrow: '◀',
    right_arrow: '▶',
    rule: '─',
    tick: '┬',
    axis: '│',
    corner: '└',
    inner: '·',
    outer: ':',
    ascii: false,
};

pub const ASCII: Glyphs = Glyphs {
    mark: 'o',
    interval: '-',
    reference: '|',
    left_arrow: '<',
    right_arrow: '>',
    rule: '-',
    tick: '+',
    axis: '|',
    corner: '+',
    inner: '.',
    outer: ':',
    ascii: true,
};

impl Glyphs {
    /// Unicode when stdout is a terminal whose locale says UTF-8; ASCII otherwise.
    pub fn for_stdout() -> Glyphs {
        use std::io::IsTerminal;
        let utf8 = ["LC_ALL", "LC_CTYPE", "LANG"]
            .iter()
            .find_map(|k| std::env::var(k).ok().filter(|v| !v.is_empty()))
            .is_some_and(|v| v.to_ascii_uppercase().replace('-', "").contains("UTF8"));
        if utf8 && std::io::stdout().is_terminal() {
            UNICODE
        } else {
            ASCII
        }
    }

    /// `text` as these glyphs can show it: in ASCII mode, ∞ becomes "inf", the ellipsis "~",
    /// the label separator "-", and any other non-ASCII character "?".
    pub fn finish(&self, text: String) -> String {
        if !self.ascii {
            return text;
        }
        text.chars()
            .map(|c| match c {
                '∞' => "inf".to_string(),
                '…' => "~".to_string(),
                '·' => "-".to_string(),
                c if c.is_ascii() => c.to_string(),
                _ => "?".to_string(),
            })
            .collect()
    }
}

/// Which picture.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    Forest,
    Funnel,
}

/// What the user asked to draw.
#[derive(Debug, Clone, Default)]
pub struct Request {
    pub kind: Option<Kind>,
    pub named: Named,
    pub file: Option<String>,
    pub level: Option<f64>,
    pub widen: bool,
    /// Whether an existing file may be overwritten.
    pub replace: bool,
}

impl Request {
    /// Parses the words after the command: `[forest|funnel] [LABEL COLUMN...] [FILE.svg|FILE.png]
    /// [level=0.9] [widen] [replace]`.
    pub fn parse(words: &[String]) -> Result<Request, String> {
        let mut r = Request::default();
        let mut columns = Vec::new();
        for w in words {
            let lower = w.to_ascii_lowercase();
            match lower.as_str() {
                "forest" if r.kind.is_none() && columns.is_empty() => r.kind = Some(Kind::Forest),
                "funnel" if r.kind.is_none() && columns.is_empty() => r.kind = Some(Kind::Funnel),
                "widen" => r.widen = true,
                "replace" => r.replace = true,
                _ if lower.starts_with("level=") => {
                    let v = lower["level=".len()..]
                        .parse::<f64>()
                        .ok()
                        .filter(|v| *v > 0.0 && *v < 1.0)
                        .ok_or_else(|| format!("{w}: the level must be a number strictly between 0 and 1"))?;
                    r.level = Some(v);
                }
                _ if lower.ends_with(".svg") || lower.ends_with(".png") => r.file = Some(w.clone()),
                _ => columns.push(w.clone()),
            }
        }
        if let Some((label, numbers)) = columns.split_first() {
            r.named = Named {
                label: Some(label.clone()),
                numbers: numbers.to_vec(),
            };
        }
        Ok(r)
    }
}

/// A picture ready to be shown or written.
#[derive(Debug, Clone)]
pub enum Picture {
    Forest(Forest),
    Funnel(Funnel),
}

impl Picture {
    /// The picture of `batches` for `request`. Without a kind, observed and expected counts
    /// make a funnel plot and anything else a forest plot.
    pub fn of(batches: &[RecordBatch], request: &Request) -> Result<Picture, String> {
        let forest = || forest_rows(batches, &request.named).map(|d| Picture::Forest(Forest::new(d, request.level)));
        let funnel = || funnel_points(batches, &request.named).map(|p| Picture::Funnel(Funnel::new(p, request.widen)));
        if batches.iter().all(|b| b.num_rows() == 0) {
            return Err("there is no result to draw yet; run a query first".into());
        }
        match request.kind {
            Some(Kind::Forest) => forest(),
            Some(Kind::Funnel) => funnel(),
            // Observed and expected counts make a funnel plot; a result without them a forest
            // plot. Any other funnel error (a bad count) is the user's to see.
            None => match funnel() {
                Err(e) if e.starts_with("the result has no observed") => forest(),
                other => other,
            },
        }
    }

    /// The picture as text for a terminal `width` characters wide.
    pub fn text(&self, width: usize, glyphs: &Glyphs) -> String {
        let text = match self {
            Picture::Forest(f) => f.text(width, glyphs),
            Picture::Funnel(f) => f.text(width, glyphs),
        };
        glyphs.finish(text)
    }

    pub fn svg(&self) -> Result<String, String> {
        match self {
            Picture::Forest(f) => f.svg(),
            Picture::Funnel(f) => f.svg(),
        }
    }

    /// Writes the picture to `path` (.svg or .png) through a temporary file renamed into place;
    /// refuses to overwrite unless `replace`. Returns a line saying what was written.
    pub fn write(&self, path: &str, replace: bool) -> Result<String, String> {
        let target = std::path::Path::new(path);
        if target.exists() && !replace {
            return Err(format!(
                "{path} exists; choose another name, or add 'replace' (--replace on the command line)"
            ));
        }
        let svg = self.svg()?;
        let lower = path.to_ascii_lowercase();
        let bytes = if lower.ends_with(".svg") {
            svg.into_bytes()
        } else if lower.ends_with(".png") {
            png_of_svg(&svg)?
        } else {
            return Err(format!("cannot draw to {path}: use a .svg or .png file name"));
        };
        let tmp = target.with_extension("partial");
        std::fs::write(&tmp, &bytes)
            .and_then(|()| std::fs::rename(&tmp, target))
            .map_err(|e| {
                let _ = std::fs::remove_file(&tmp);
                format!("{path}: {e}")
            })?;
        let what = match self {
            Picture::Forest(f) => format!("a forest plot of {} rows", f.rows.len()),
            Picture::Funnel(f) => format!("a funnel plot of {} areas", f.points.len()),
        };
        Ok(format!("wrote {what} to {path}"))
    }
}

/// Rasterises SVG text to PNG bytes at its own size, with the shipped font.
pub fn png_of_svg(svg: &str) -> Result<Vec<u8>, String> {
    use resvg::{tiny_skia, usvg};
    let mut options = usvg::Options::default();
    options
        .fontdb_mut()
        .load_font_data(epaint_default_fonts::HACK_REGULAR.to_vec());
    options.font_family = "Hack".to_string();
    let tree = usvg::Tree::from_str(svg, &options).map_err(|e| format!("reading the drawn SVG: {e}"))?;
    let size = tree.size().to_int_size();
    let mut pixmap =
        tiny_skia::Pixmap::new(size.width(), size.height()).ok_or_else(|| "the picture has no area".to_string())?;
    resvg::render(&tree, tiny_skia::Transform::default(), &mut pixmap.as_mut());
    pixmap.encode_png().map_err(|e| format!("encoding PNG: {e}"))
}
