//! DIR/report.html: one self-contained page (inline CSS, no scripts, no network) with the verdict, the
//! caution, a table of components, the run metadata and the pictures, which it references by file name
//! relative to DIR.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use super::write_atomic;
use crate::error::Result;

/// The file name inside the output folder.
pub const FILE_NAME: &str = "report.html";

/// A picture on the page.
#[derive(Debug, Clone, Copy)]
pub struct Figure<'a> {
    /// The file name relative to the output folder, e.g. "trace.png".
    pub file: &'a str,
    /// What the picture shows.
    pub caption: &'a str,
}

/// The contents of the report page. All text is escaped when written.
#[derive(Debug, Clone, Copy)]
pub struct ReportPage<'a> {
    pub title: &'a str,
    /// The verdict paragraph (e.g. "Converged: all R-hat below 1.01 and bulk ESS above 400").
    pub verdict: &'a str,
    /// Whether the verdict is favourable (green) or not (red); `None` draws it neutral.
    pub passed: Option<bool>,
    /// The caution that the spread is conditional on the model, B and R.
    pub caution: &'a str,
    /// Column headers of the component table.
    pub columns: &'a [String],
    /// Table rows, already in display order (worst-converged first: see [`super::worst_first`]).
    pub rows: &'a [Vec<String>],
    /// Most rows shown; the rest are counted in a note pointing to components.csv.
    pub max_rows: usize,
    /// Run metadata as (key, value) pairs.
    pub metadata: &'a [(String, String)],
    pub figures: &'a [Figure<'a>],
}

/// Escapes text for HTML element content and quoted attribute values.
pub fn escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
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

/// Percent-encodes a relative file path for a `src` attribute (RFC 3986: unreserved characters and
/// `/` kept).
fn url_path(s: &str) -> String {
    let mut out = String::new();
    for b in s.bytes() {
        if b.is_ascii_alphanumeric() || b"-._~/".contains(&b) {
            out.push(b as char);
        } else {
            let _ = write!(out, "%{b:02X}");
        }
    }
    out
}

const STYLE: &str = "
body { font-family: 'DejaVu Sans', Verdana, Arial, sans-serif; margin: 2em auto; max-width: 1160px;
       padding: 0 1em; color: #1a1a1a; line-height: 1.45; }
h1 { font-size: 1.7em; margin-bottom: 0.3em; }
h2 { font-size: 1.25em; margin-top: 1.8em; border-bottom: 1px solid #ccc; padding-bottom: 0.2em; }
.verdict { font-size: 1.15em; padding: 0.8em 1em; border-radius: 6px; border-left: 8px solid #777;
           background: #f2f2f2; }
.verdict.pass { border-left-color: #1b7837; background: #e8f5ea; }
.verdict.fail { border-left-color: #b2182b; background: #fbeaea; }
.caution { font-size: 1.05em; padding: 0.8em 1em; border: 2px solid #d08c00; background: #fff6df;
           border-radius: 6px; margin-top: 1em; }
table { border-collapse: collapse; font-size: 0.92em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: right; }
th { background: #eee; position: sticky; top: 0; }
td:first-child, th:first-child { text-align: left; }
tbody tr:nth-child(even) { background: #fafafa; }
.note { color: #555; font-size: 0.92em; }
dl.meta { display: grid; grid-template-columns: max-content auto; gap: 0.2em 1.2em; }
dl.meta dt { font-weight: bold; }
dl.meta dd { margin: 0; font-family: 'DejaVu Sans Mono', monospace; word-break: break-all; }
figure { margin: 1.5em 0; }
figure img { max-width: 100%; border: 1px solid #ddd; }
figcaption { color: #333; font-size: 0.95em; margin-top: 0.3em; }
";

/// Writes DIR/report.html atomically and returns its path. A figure whose file is not in DIR is listed
/// as missing rather than linked.
pub fn write_report(dir: &Path, page: &ReportPage<'_>) -> Result<PathBuf> {
    let mut h = String::new();
    head(&mut h, page);
    if !page.metadata.is_empty() {
        h.push_str("<h2>Run</h2>\n<dl class=\"meta\">\n");
        for (k, v) in page.metadata {
            let _ = writeln!(h, "<dt>{}</dt><dd>{}</dd>", escape(k), escape(v));
        }
        h.push_str("</dl>\n");
    }
    components_table(&mut h, dir, page);
    pictures(&mut h, dir, page.figures);
    h.push_str("</body>\n</html>\n");
    let path = dir.join(FILE_NAME);
    write_atomic(&path, h.as_bytes())?;
    Ok(path)
}

/// The document head, the title, the verdict and the caution.
fn head(h: &mut String, page: &ReportPage<'_>) {
    let title = escape(page.title);
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <title>{title}</title>\n<style>{STYLE}</style>\n</head>\n<body>\n<h1>{title}</h1>\n\
         <p class=\"note\">Written {} by varpost {}.</p>\n",
        super::utc_now(),
        env!("CARGO_PKG_VERSION")
    );
    let class = match page.passed {
        Some(true) => "verdict pass",
        Some(false) => "verdict fail",
        None => "verdict",
    };
    let _ = writeln!(h, "<p class=\"{class}\">{}</p>", escape(page.verdict));
    let _ = writeln!(
        h,
        "<p class=\"caution\"><strong>Caution.</strong> {}</p>",
        escape(page.caution)
    );
}

/// The components table, at most `max_rows` rows, with a pointer to components.csv for the rest.
fn components_table(h: &mut String, dir: &Path, page: &ReportPage<'_>) {
    h.push_str("<h2>Components</h2>\n");
    let shown = page.rows.len().min(page.max_rows);
    if page.rows.len() > shown {
        let csv = if dir.join("components.csv").is_file() {
            "<a href=\"components.csv\">components.csv</a>"
        } else {
            "components.csv"
        };
        let _ = writeln!(
            h,
            "<p class=\"note\">The {shown} least-converged of {} components; all are in {csv}.</p>",
            page.rows.len()
        );
    } else {
        h.push_str("<p class=\"note\">Least-converged first.</p>\n");
    }
    h.push_str("<table>\n<thead><tr>");
    for c in page.columns {
        let _ = write!(h, "<th>{}</th>", escape(c));
    }
    h.push_str("</tr></thead>\n<tbody>\n");
    for row in &page.rows[..shown] {
        h.push_str("<tr>");
        for cell in row {
            let _ = write!(h, "<td>{}</td>", escape(cell));
        }
        h.push_str("</tr>\n");
    }
    h.push_str("</tbody>\n</table>\n");
}

/// The figures that exist in `dir`, and a note for each that does not.
fn pictures(h: &mut String, dir: &Path, figures: &[Figure<'_>]) {
    if !figures.is_empty() {
        h.push_str("<h2>Pictures</h2>\n");
    }
    for f in figures {
        if dir.join(f.file).is_file() {
            let _ = writeln!(
                h,
                "<figure><img src=\"{}\" alt=\"{}\"><figcaption>{}</figcaption></figure>",
                escape(&url_path(f.file)),
                escape(f.caption),
                escape(f.caption)
            );
        } else {
            let _ = writeln!(
                h,
                "<p class=\"note\">Picture not available: {} ({}).</p>",
                escape(f.caption),
                escape(f.file)
            );
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escapes_the_five_html_specials() {
        // The characters HTML requires escaped in text and attributes (WHATWG HTML Living Standard,
        // 13.1.2 and 13.5, from memory).
        assert_eq!(
            escape(r#"<a href="x">&'</a>"#),
            "&lt;a href=&quot;x&quot;&gt;&amp;&#39;&lt;/a&gt;"
        );
        assert_eq!(url_path("plots/a b.png"), "plots/a%20b.png");
    }
}
