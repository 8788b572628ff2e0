//! Printers for the client subcommands: aligned text tables, CSV, and number formatting.
//!
//! JSON is built with `serde_json` by each command; this module only holds what several
//! commands share.

use std::fmt::Write as _;

/// How a client command prints its answer.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, clap::ValueEnum)]
pub(crate) enum OutputFormat {
    /// Aligned columns for reading on a terminal.
    #[default]
    Table,
    /// One JSON document.
    Json,
    /// Comma-separated values with a header line (RFC 4180 quoting).
    Csv,
}

/// A text table: a header row and rows of cells, numbers right-aligned.
#[derive(Debug, Default)]
pub(crate) struct Table {
    headers: Vec<String>,
    rows: Vec<Vec<String>>,
}

impl Table {
    pub(crate) fn new<S: Into<String>>(headers: impl IntoIterator<Item = S>) -> Self {
        Self {
            headers: headers.into_iter().map(Into::into).collect(),
            rows: Vec::new(),
        }
    }

    pub(crate) fn row<S: Into<String>>(&mut self, cells: impl IntoIterator<Item = S>) {
        self.rows.push(cells.into_iter().map(Into::into).collect());
    }

    /// Renders with two spaces between columns; a column whose cells all look numeric is
    /// right-aligned, any other left-aligned.
    pub(crate) fn render(&self) -> String {
        let ncols = self
            .rows
            .iter()
            .map(Vec::len)
            .chain(std::iter::once(self.headers.len()))
            .max()
            .unwrap_or(0);
        fn cell(row: &[String], c: usize) -> &str {
            row.get(c).map(String::as_str).unwrap_or("")
        }
        let mut widths = vec![0usize; ncols];
        let mut numeric = vec![true; ncols];
        for (c, w) in widths.iter_mut().enumerate() {
            *w = cell(&self.headers, c).chars().count();
            for row in &self.rows {
                let text = cell(row, c);
                *w = (*w).max(text.chars().count());
                if !text.is_empty() && !looks_numeric(text) {
                    numeric[c] = false;
                }
            }
        }
        let mut out = String::new();
        let mut line = |row: &[String]| {
            let mut text = String::new();
            for c in 0..ncols {
                if c > 0 {
                    text.push_str("  ");
                }
                let v = cell(row, c);
                let pad = widths[c].saturating_sub(v.chars().count());
                if numeric[c] {
                    text.push_str(&" ".repeat(pad));
                    text.push_str(v);
                } else {
                    text.push_str(v);
                    text.push_str(&" ".repeat(pad));
                }
            }
            let _ = writeln!(out, "{}", text.trim_end());
        };
        line(&self.headers);
        for row in &self.rows {
            line(row);
        }
        out
    }
}

/// True for cells such as `5400`, `-12.5`, `5398*~`, `+12h`, `NaN`: numbers with marks.
fn looks_numeric(text: &str) -> bool {
    let core = text.trim_end_matches(['*', '~', '!', 'h', 'm', 's', '%']);
    let core = core.strip_prefix('+').unwrap_or(core);
    core == "NaN" || core == "-" || core.parse::<f64>().is_ok()
}

/// A CSV document: the header is written first, then one line per record.
#[derive(Debug, Default)]
pub(crate) struct Csv {
    out: String,
}

impl Csv {
    pub(crate) fn new<S: AsRef<str>>(headers: impl IntoIterator<Item = S>) -> Self {
        let mut csv = Self { out: String::new() };
        csv.record(headers);
        csv
    }

    pub(crate) fn record<S: AsRef<str>>(&mut self, cells: impl IntoIterator<Item = S>) {
        let mut first = true;
        for cell in cells {
            if !first {
                self.out.push(',');
            }
            first = false;
            self.out.push_str(&csv_quote(cell.as_ref()));
        }
        self.out.push('\n');
    }

    pub(crate) fn finish(self) -> String {
        self.out
    }
}

/// Quotes a CSV field when it holds a comma, quote or line break (RFC 4180 §2).
fn csv_quote(field: &str) -> String {
    if field.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", field.replace('"', "\"\""))
    } else {
        field.to_string()
    }
}

/// A lead time for people: `+12h`, `+90m`, `+45s`, `-6h`.
pub(crate) fn lead_label(seconds: i64) -> String {
    let sign = if seconds < 0 { "-" } else { "+" };
    let s = seconds.unsigned_abs();
    if s % 3600 == 0 {
        format!("{sign}{}h", s / 3600)
    } else if s % 60 == 0 {
        format!("{sign}{}m", s / 60)
    } else {
        format!("{sign}{s}s")
    }
}

/// A number with a fixed count of decimals, or `NaN` for a missing value.
pub(crate) fn number(v: f64, decimals: usize) -> String {
    if v.is_finite() {
        format!("{v:.decimals$}")
    } else {
        "NaN".to_string()
    }
}

/// A number for CSV: full precision of the wire value, empty when missing.
pub(crate) fn csv_number(v: f64) -> String {
    if v.is_finite() {
        format!("{v}")
    } else {
        String::new()
    }
}

/// A JSON number, or `null` for a missing value (JSON has no NaN).
pub(crate) fn json_number(v: f64) -> serde_json::Value {
    serde_json::Number::from_f64(v)
        .map(serde_json::Value::Number)
        .unwrap_or(serde_json::Value::Null)
}

/// A size in bytes for people: `512 B`, `1.5 MiB`.
pub(crate) fn bytes_label(bytes: u64) -> String {
    const UNITS: [&str; 5] = ["B", "KiB", "MiB", "GiB", "TiB"];
    let mut v = bytes as f64;
    let mut unit = 0;
    while v >= 1024.0 && unit + 1 < UNITS.len() {
        v /= 1024.0;
        unit += 1;
    }
    if unit == 0 {
        format!("{bytes} B")
    } else {
        format!("{v:.1} {}", UNITS[unit])
    }
}

/// A message and the causes from `source` on as one line, `message: cause: cause`, leaving
/// out a cause whose text the line already holds (many errors print their source in their
/// own message too) and any line breaks.
pub(crate) fn one_line(
    message: String,
    mut source: Option<&(dyn std::error::Error + 'static)>,
) -> String {
    let mut text = message;
    while let Some(cause) = source {
        let more = cause.to_string();
        if !text.contains(&more) {
            text.push_str(": ");
            text.push_str(&more);
        }
        source = cause.source();
    }
    text.replace('\n', " ")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn one_line_keeps_each_cause_once_and_on_one_line() {
        // The shape of an ingest error: the message already holds its source's text, and an
        // outer error repeats the message.
        let io = std::io::Error::new(std::io::ErrorKind::NotFound, "no such file");
        let inner = anyhow::Error::new(io).context("cannot read 'a.nc': no such file");
        let outer = inner.context("loading 'a.nc'");
        assert_eq!(
            one_line(outer.to_string(), outer.source()),
            "loading 'a.nc': cannot read 'a.nc': no such file"
        );
        let broken = std::io::Error::other("line one\nline two");
        assert_eq!(
            one_line("call failed".to_string(), Some(&broken)),
            "call failed: line one line two"
        );
    }

    #[test]
    fn table_aligns_numbers_right_and_text_left() {
        let mut t = Table::new(["site", "value"]);
        t.row(["Vellmouth", "5402"]);
        t.row(["Quillhaven", "5398*"]);
        let text = t.render();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines[0], "site        value");
        assert_eq!(lines[1], "Vellmouth    5402");
        assert_eq!(lines[2], "Quillhaven  5398*");
    }

    #[test]
    fn csv_quotes_only_what_needs_it() {
        let mut csv = Csv::new(["a", "b"]);
        csv.record(["plain", "with, comma"]);
        csv.record(["say \"hi\"", ""]);
        assert_eq!(
            csv.finish(),
            "a,b\nplain,\"with, comma\"\n\"say \"\"hi\"\"\",\n"
        );
    }

    #[test]
    fn lead_times_and_sizes_read_well() {
        assert_eq!(lead_label(0), "+0h");
        assert_eq!(lead_label(43200), "+12h");
        assert_eq!(lead_label(5400), "+90m");
        assert_eq!(lead_label(-21600), "-6h");
        assert_eq!(lead_label(45), "+45s");
        assert_eq!(bytes_label(512), "512 B");
        assert_eq!(bytes_label(3 * 1024 * 1024 / 2), "1.5 MiB");
        assert_eq!(number(f64::NAN, 1), "NaN");
        assert_eq!(csv_number(f64::NAN), "");
        assert_eq!(json_number(f64::INFINITY), serde_json::Value::Null);
    }
}
