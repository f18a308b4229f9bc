//! HTML building blocks of the report: escaping, number formatting, tables, figures, and the
//! page's one inline style sheet.

use std::fmt::Write as _;

/// The report's style sheet, inline in `<head>`: system fonts only, nothing fetched.
pub const STYLE: &str = "\
:root{--ink:#1d232a;--muted:#55606b;--rule:#c9d0d6;--band:#f2f4f6;--warn:#fff5e0;--warn-rule:#d9a441}
*{box-sizing:border-box}
body{margin:0;background:#fff;color:var(--ink);font:15px/1.5 system-ui,-apple-system,'Segoe UI',Roboto,'Noto Sans',sans-serif}
main{max-width:1040px;margin:0 auto;padding:24px 20px 48px}
h1{font-size:1.6em;margin:0 0 4px}
h2{font-size:1.25em;margin:36px 0 8px;padding-bottom:4px;border-bottom:2px solid var(--rule)}
h3{font-size:1.05em;margin:22px 0 6px}
p{margin:6px 0}
.label{color:var(--muted);margin:0 0 14px}
dl.facts{display:grid;grid-template-columns:max-content 1fr;gap:2px 14px;margin:8px 0;font-size:.93em}
dl.facts dt{color:var(--muted)}
dl.facts dd{margin:0;overflow-wrap:anywhere}
code,.hash{font-family:ui-monospace,'SFMono-Regular',Menlo,Consolas,'DejaVu Sans Mono',monospace;font-size:.92em}
.caution{background:var(--warn);border-left:5px solid var(--warn-rule);padding:10px 14px;margin:16px 0}
.caution h2{border:0;margin:0 0 4px;padding:0;font-size:1.1em}
.status{display:inline-block;padding:1px 8px;border-radius:3px;background:var(--band);font-weight:600}
figure{margin:18px 0 26px;padding:0}
figure svg{display:block;max-width:100%;height:auto;border:1px solid var(--rule)}
figcaption{font-size:.9em;color:var(--muted);margin-top:6px}
figcaption b{color:var(--ink)}
table{border-collapse:collapse;margin:8px 0 16px;font-size:.9em}
th,td{border:1px solid var(--rule);padding:3px 8px;text-align:left;vertical-align:top}
th{background:var(--band)}
td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
.flagged{font-weight:600;color:#8a3b00}
.note{color:var(--muted);font-size:.9em}
ul.warnings li{margin:3px 0}
footer{margin-top:40px;color:var(--muted);font-size:.85em;border-top:1px solid var(--rule);padding-top:8px}
";

/// `text` with the five HTML-significant characters escaped (for text and attributes).
pub fn esc(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

/// A number for reading: four significant digits, scientific notation for very small or very
/// large magnitudes, `0` for zero, `—` for a non-finite value.
pub fn num(x: f64) -> String {
    if !x.is_finite() {
        return "—".to_owned();
    }
    if x == 0.0 {
        return "0".to_owned();
    }
    let a = x.abs();
    if !(1e-4..1e6).contains(&a) {
        return format!("{x:.3e}");
    }
    let digits = (3 - a.log10().floor() as i32).max(0) as usize;
    let text = format!("{x:.digits$}");
    if text.contains('.') {
        text.trim_end_matches('0').trim_end_matches('.').to_owned()
    } else {
        text
    }
}

/// An optional number, `—` when absent.
pub fn opt_num(x: Option<f64>) -> String {
    x.map(num).unwrap_or_else(|| "—".to_owned())
}

/// An interval as `[low, high]`, `—` when absent.
pub fn interval(ci: Option<(f64, f64)>) -> String {
    match ci {
        Some((a, b)) => format!("[{}, {}]", num(a), num(b)),
        None => "—".to_owned(),
    }
}

/// One table cell: text (escaped) or a right-aligned number (already formatted).
pub enum Cell {
    /// Text, escaped when written.
    Text(String),
    /// A formatted number, right-aligned.
    Num(String),
}

/// A table with a header row, written as HTML.
pub struct Table {
    head: Vec<&'static str>,
    rows: Vec<(Vec<Cell>, bool)>,
}

impl Table {
    /// A table with these column headings.
    pub fn new(head: &[&'static str]) -> Self {
        Self {
            head: head.to_vec(),
            rows: Vec::new(),
        }
    }

    /// Adds a row; `flagged` rows are set in bold.
    pub fn row(&mut self, cells: Vec<Cell>, flagged: bool) {
        self.rows.push((cells, flagged));
    }

    /// Whether the table has no rows.
    pub fn is_empty(&self) -> bool {
        self.rows.is_empty()
    }

    /// The table's markup.
    pub fn html(&self) -> String {
        let mut out = String::from("<table>\n<thead><tr>");
        for h in &self.head {
            let _ = write!(out, "<th>{}</th>", esc(h));
        }
        out.push_str("</tr></thead>\n<tbody>\n");
        for (cells, flagged) in &self.rows {
            out.push_str(if *flagged {
                "<tr class=\"flagged\">"
            } else {
                "<tr>"
            });
            for cell in cells {
                match cell {
                    Cell::Text(t) => {
                        let _ = write!(out, "<td>{}</td>", esc(t));
                    }
                    Cell::Num(t) => {
                        let _ = write!(out, "<td class=\"num\">{}</td>", esc(t));
                    }
                }
            }
            out.push_str("</tr>\n");
        }
        out.push_str("</tbody>\n</table>\n");
        out
    }
}

/// A figure: the chart's inline SVG (from [`crate::report::charts`]) and its caption
/// (markup, already escaped).
pub fn figure(id: &str, svg: &str, caption_html: &str) -> String {
    format!(
        "<figure id=\"{}\" class=\"chart\">\n{}\n<figcaption>{}</figcaption>\n</figure>\n",
        esc(id),
        svg,
        caption_html
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn markup_characters_are_escaped() {
        assert_eq!(
            esc("<a href=\"x\">&'</a>"),
            "&lt;a href=&quot;x&quot;&gt;&amp;&#39;&lt;/a&gt;"
        );
    }

    #[test]
    fn numbers_keep_four_significant_digits() {
        assert_eq!(num(0.0), "0");
        assert_eq!(num(0.034459974), "0.03446");
        assert_eq!(num(1.5), "1.5");
        assert_eq!(num(319.1185), "319.1");
        assert_eq!(num(-2.0), "-2");
        assert_eq!(num(12345.0), "12345");
        assert_eq!(num(3.2e-7), "3.200e-7");
        assert_eq!(num(f64::NAN), "—");
        assert_eq!(interval(Some((0.01, 0.03))), "[0.01, 0.03]");
    }
}
