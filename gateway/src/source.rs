//! Reading interval data from meters' exports: CSV or JSON lines.
//!
//! CSV needs a header naming `meter_id`, `interval_start` (UTC epoch seconds) and
//! exactly one of `kw` (average kW over the interval) or `wh` (energy in the
//! interval). JSON lines carry the same keys per object. Unknown CSV columns are
//! ignored, so a meter export with extra columns can be read as it is.

use meterveil_shared::{FieldError, IntervalLength, IntervalStart, MeterId};

/// Largest average power we believe from a household or small-business meter, in kW.
/// Anything above is a unit mix-up (W sent as kW) or a fault.
pub const MAX_READING_KW: f64 = 1000.0;

/// One interval reading as it comes from the meter. Lives only in memory.
#[derive(Debug, Clone, PartialEq)]
pub struct RawReading {
    pub meter_id: MeterId,
    pub interval_start: i64,
    /// Average power over the interval, kW.
    pub kw: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Unit {
    Kw,
    Wh,
}

/// Input format of a source.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Format {
    Csv,
    Jsonl,
}

impl Format {
    /// Guesses from a file name: `.jsonl`/`.ndjson`/`.json` are JSON lines, anything else CSV.
    pub fn from_path(path: &std::path::Path) -> Format {
        match path.extension().and_then(|e| e.to_str()) {
            Some("jsonl" | "ndjson" | "json") => Format::Jsonl,
            _ => Format::Csv,
        }
    }
}

/// The columns of a CSV source, learned from its header (names lowercased).
#[derive(Debug, Clone)]
pub struct CsvLayout {
    header: csv::StringRecord,
    meter: usize,
    unit: Unit,
}

/// One CSV data line, by column name; other columns are ignored.
#[derive(serde::Deserialize)]
struct CsvReading {
    meter_id: String,
    interval_start: i64,
    #[serde(default)]
    kw: Option<f64>,
    #[serde(default)]
    wh: Option<f64>,
}

/// One line of CSV as a record (quoted fields and all), through the csv crate.
fn csv_record(line: &str) -> Result<csv::StringRecord, FieldError> {
    let mut r = csv::ReaderBuilder::new().has_headers(false).trim(csv::Trim::All).from_reader(line.as_bytes());
    let mut rec = csv::StringRecord::new();
    match r.read_record(&mut rec) {
        Ok(true) => Ok(rec),
        Ok(false) => Err(FieldError::new("line", "is empty")),
        Err(_) => Err(FieldError::new("line", "is not a CSV record")),
    }
}

impl CsvLayout {
    pub fn from_header(header: &str) -> Result<Self, FieldError> {
        let header: csv::StringRecord = csv_record(header)?.iter().map(str::to_ascii_lowercase).collect();
        let find = |name: &str| header.iter().position(|c| c == name);
        let meter = find("meter_id").ok_or_else(|| FieldError::new("header", "has no meter_id column"))?;
        find("interval_start").ok_or_else(|| FieldError::new("header", "has no interval_start column"))?;
        let unit = match (find("kw"), find("wh")) {
            (Some(_), None) => Unit::Kw,
            (None, Some(_)) => Unit::Wh,
            (Some(_), Some(_)) => {
                return Err(FieldError::new(
                    "header",
                    "has both kw and wh columns; keep one so the unit is unambiguous",
                ))
            }
            (None, None) => return Err(FieldError::new("header", "has neither a kw nor a wh column")),
        };
        Ok(Self { header, meter, unit })
    }

    /// The meter id a data line names, where it can be read.
    fn meter_of(&self, line: &str) -> Option<String> {
        csv_record(line).ok().and_then(|r| r.get(self.meter).map(str::to_owned))
    }
}

/// A line that could not be read: its 1-based line number, the meter it names
/// (where one can be read), the field and the reason. Never the value: a
/// rejected reading is still a household's reading, and logs are kept.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("line {line}{}: {error}", meter.as_ref().map(|m| format!(", meter {m}")).unwrap_or_default())]
pub struct LineError {
    pub line: u64,
    pub meter: Option<String>,
    pub error: FieldError,
}

fn to_kw(unit: Unit, value: f64, len: IntervalLength) -> f64 {
    match unit {
        Unit::Kw => value,
        Unit::Wh => value / 1000.0 / len.hours(),
    }
}

fn check_value(field: &str, kw: f64) -> Result<f64, FieldError> {
    if !kw.is_finite() {
        return Err(FieldError::new(field, "is not a finite number"));
    }
    if kw < 0.0 {
        return Err(FieldError::new(field, "is negative; exported energy is not supported"));
    }
    if kw > MAX_READING_KW {
        return Err(FieldError::new(field, format!("is above the {MAX_READING_KW} kW plausibility limit")));
    }
    Ok(kw)
}

fn finish(meter: &str, start: i64, kw: f64, unit: Unit, len: IntervalLength) -> Result<RawReading, FieldError> {
    let meter_id = MeterId::parse(meter.trim())?;
    IntervalStart::new(start, len)?;
    let field = match unit {
        Unit::Kw => "kw",
        Unit::Wh => "wh",
    };
    let kw = check_value(field, to_kw(unit, kw, len))?;
    Ok(RawReading { meter_id, interval_start: start, kw })
}

/// Parses one CSV data line. A value that does not parse is named by its
/// column, never quoted.
pub fn parse_csv_line(layout: &CsvLayout, line: &str, len: IntervalLength) -> Result<RawReading, FieldError> {
    let rec = csv_record(line)?;
    if rec.len() != layout.header.len() {
        return Err(FieldError::new(
            "line",
            format!("has {} columns; the header has {}", rec.len(), layout.header.len()),
        ));
    }
    let r: CsvReading = rec.deserialize(Some(&layout.header)).map_err(|e| {
        let column = match e.kind() {
            csv::ErrorKind::Deserialize { err, .. } => err.field().and_then(|i| layout.header.get(i as usize)),
            _ => None,
        };
        match column {
            Some("interval_start") => FieldError::new("interval_start", "is not an integer epoch second"),
            Some(c @ ("kw" | "wh")) => FieldError::new(c, "is not a number"),
            Some(c) => FieldError::new(c, "cannot be read"),
            None => FieldError::new("line", "cannot be read"),
        }
    })?;
    let value = match layout.unit {
        Unit::Kw => r.kw,
        Unit::Wh => r.wh,
    };
    let value_name = if layout.unit == Unit::Kw { "kw" } else { "wh" };
    let value = value.ok_or_else(|| FieldError::new(value_name, "is empty"))?;
    finish(&r.meter_id, r.interval_start, value, layout.unit, len)
}

#[derive(serde::Deserialize)]
#[serde(deny_unknown_fields)]
struct JsonReading {
    meter_id: String,
    interval_start: i64,
    kw: Option<f64>,
    wh: Option<f64>,
}

/// Parses one JSON-lines object.
pub fn parse_json_line(line: &str, len: IntervalLength) -> Result<RawReading, FieldError> {
    // serde's message can quote the offending value: report its kind and column only.
    let r: JsonReading = serde_json::from_str(line).map_err(|e| {
        FieldError::new("json", format!("is not a reading object ({:?} error at column {})", e.classify(), e.column()))
    })?;
    let (value, unit) = match (r.kw, r.wh) {
        (Some(k), None) => (k, Unit::Kw),
        (None, Some(w)) => (w, Unit::Wh),
        (Some(_), Some(_)) => return Err(FieldError::new("kw", "both kw and wh are given; send one")),
        (None, None) => return Err(FieldError::new("kw", "neither kw nor wh is given")),
    };
    finish(&r.meter_id, r.interval_start, value, unit, len)
}

/// Incremental parser over the lines of one source. Keeps the CSV layout once the
/// header has been seen, so a source can be fed in pieces.
#[derive(Debug, Clone)]
pub struct LineParser {
    format: Format,
    layout: Option<CsvLayout>,
    line: u64,
}

impl LineParser {
    pub fn new(format: Format) -> Self {
        Self { format, layout: None, line: 0 }
    }

    /// Parses the next line. `Ok(None)` for blank lines, comments (`#`) and the CSV header.
    pub fn next_line(&mut self, text: &str, len: IntervalLength) -> Result<Option<RawReading>, LineError> {
        self.line += 1;
        let line = self.line;
        let t = text.trim();
        if t.is_empty() || t.starts_with('#') {
            return Ok(None);
        }
        let meter = || -> Option<String> {
            match (self.format, &self.layout) {
                (Format::Csv, Some(l)) => l.meter_of(t),
                (Format::Jsonl, _) => serde_json::from_str::<serde_json::Value>(t)
                    .ok()
                    .and_then(|v| v.get("meter_id").and_then(|m| m.as_str()).map(str::to_owned)),
                _ => None,
            }
            .filter(|m| MeterId::parse(m).is_ok())
        };
        let wrap = |error| LineError { line, meter: meter(), error };
        match self.format {
            Format::Jsonl => parse_json_line(t, len).map(Some).map_err(wrap),
            Format::Csv => match &self.layout {
                None => {
                    self.layout = Some(CsvLayout::from_header(t).map_err(wrap)?);
                    Ok(None)
                }
                Some(layout) => parse_csv_line(layout, t, len).map(Some).map_err(wrap),
            },
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const Q: IntervalLength = IntervalLength::QUARTER_HOUR;

    #[test]
    fn csv_in_kw_and_wh() {
        let mut p = LineParser::new(Format::Csv);
        assert_eq!(p.next_line("meter_id,interval_start,wh,extra", Q).unwrap(), None);
        let r = p.next_line("m1,1700000050,500,x", Q);
        // 1700000050 is not a quarter-hour boundary.
        assert!(r.is_err());
        let r = p.next_line("m1,1699999200,500,x", Q).unwrap().unwrap();
        assert!((r.kw - 2.0).abs() < 1e-12, "500 Wh in 15 min is 2 kW");
        // Quoted cells, as spreadsheet exports write them, with a comma inside a note.
        let r = p.next_line("\"m1\",\"1699999200\",\"250\",\"read, then checked\"", Q).unwrap().unwrap();
        assert!((r.kw - 1.0).abs() < 1e-12);
    }

    #[test]
    fn json_lines() {
        let mut p = LineParser::new(Format::Jsonl);
        let r = p.next_line(r#"{"meter_id":"m2","interval_start":1699999200,"kw":1.25}"#, Q).unwrap().unwrap();
        assert_eq!(r.kw, 1.25);
        let e = p.next_line(r#"{"meter_id":"m2","interval_start":1699999200}"#, Q).unwrap_err();
        assert_eq!(e.line, 2);
        assert_eq!(e.error.field, "kw");
    }

    #[test]
    fn bad_lines_name_line_and_field() {
        let mut p = LineParser::new(Format::Csv);
        p.next_line("meter_id,interval_start,kw", Q).unwrap();
        let cases = [
            ("m1,abc,1.0", "interval_start"),
            ("m1,1699999200,-1", "kw"),
            ("m1,1699999200,NaN", "kw"),
            ("m1,1699999200,5000", "kw"),
            ("bad id,1699999200,1", "meter_id"),
            ("m1,1699999200", "line"),
        ];
        for (i, (text, field)) in cases.iter().enumerate() {
            let e = p.next_line(text, Q).unwrap_err();
            assert_eq!(e.line, i as u64 + 2);
            assert_eq!(e.error.field, *field, "{text}: {e}");
        }
        assert!(CsvLayout::from_header("meter_id,interval_start,kw,wh").is_err());
        assert!(CsvLayout::from_header("meter,interval_start,kw").is_err());
    }
}
