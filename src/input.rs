//! Readings from CSV text, grouped into subgroups.
//!
//! Three layouts:
//! * **wide** — one row per subgroup, each selected field a reading (all fields unless
//!   reading columns are named); an optional header row.
//! * **long** — a subgroup column and a value column; rows with the same subgroup key form one
//!   subgroup, in order of first appearance. A header names the columns.
//! * **single** — one reading per row, grouped consecutively into subgroups of a given size.
//!
//! A first row none of whose fields is a number is taken as a header. Lines starting with `#`
//! are comments. This module parses text it is given; reading the file is the caller's job.

use serde::Serialize;

/// How readings are laid out in the file.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, clap::ValueEnum)]
pub enum Layout {
    Wide,
    Long,
    Single,
}

/// Options for [`parse`].
#[derive(Debug, Clone, PartialEq)]
pub struct InputOptions {
    pub layout: Layout,
    /// Columns that hold readings (wide: any number; long and single: at most one).
    pub value_columns: Vec<String>,
    /// The subgroup key column (long layout); `subgroup` when not given.
    pub subgroup_column: Option<String>,
    /// Readings per subgroup (single layout); 1 when not given.
    pub subgroup_size: Option<usize>,
    pub delimiter: u8,
    /// Readings written with a decimal comma (`12,0026`), as spreadsheets in many countries
    /// save them (then fields are usually separated by `;`).
    pub decimal_comma: bool,
}

impl InputOptions {
    /// Defaults for `layout`: comma-separated, columns found from the header.
    pub fn new(layout: Layout) -> Self {
        InputOptions {
            layout,
            value_columns: Vec::new(),
            subgroup_column: None,
            subgroup_size: None,
            delimiter: b',',
            decimal_comma: false,
        }
    }
}

/// Subgroups read from a file.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Parsed {
    /// Readings of each subgroup, in input order.
    pub subgroups: Vec<Vec<f64>>,
    /// A label per subgroup: its key (long layout) or the line it starts on.
    pub labels: Vec<String>,
    /// Non-fatal remarks (readings left over, ...).
    pub warnings: Vec<String>,
}

/// Why a file could not be read into subgroups. Every variant names the file and, where there
/// is one, the line and column (both from 1) and the value found.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum InputError {
    #[error("{file}:{line}: {message}")]
    Csv {
        file: String,
        line: u64,
        message: String,
    },
    #[error(
        "{file}:{line}:{column}: {} is not a number{}{}",
        show(value),
        col_name(name),
        comma_hint(value)
    )]
    NotNumeric {
        file: String,
        line: u64,
        column: usize,
        name: Option<String>,
        value: String,
    },
    #[error(
        "{file}:{line}:{column}: \"{value}\" is not a finite reading (NaN and infinity are refused){}",
        col_name(name)
    )]
    NotFinite {
        file: String,
        line: u64,
        column: usize,
        name: Option<String>,
        value: String,
    },
    #[error(
        "{file}:{line}: the row has {found} fields but the first row has {expected}; every row of the wide layout must have the same number of readings (use --layout long for subgroups of different sizes)"
    )]
    Ragged {
        file: String,
        line: u64,
        expected: usize,
        found: usize,
    },
    #[error("{file}: no column named \"{name}\" (the header has: {})", available.join(", "))]
    MissingColumn {
        file: String,
        name: String,
        available: Vec<String>,
    },
    #[error("{file}: the {layout} layout needs a header row naming the {what} column")]
    NoHeader {
        file: String,
        layout: &'static str,
        what: &'static str,
    },
    #[error("{file}: {found} columns and no --value-column to say which holds the readings")]
    WhichColumn { file: String, found: usize },
    #[error("{file}: --subgroup-size {size} is invalid: {why}")]
    SubgroupSize {
        file: String,
        size: usize,
        why: &'static str,
    },
    #[error("{file}: no readings found")]
    Empty { file: String },
    #[error("{file}:{line}:{column}: {value} is not {what}{}", col_name(name))]
    BadCount {
        file: String,
        line: u64,
        column: usize,
        name: Option<String>,
        value: String,
        what: &'static str,
    },
    #[error(
        "{file}:{line}: {count} nonconforming of {size} inspected: a sample cannot have more nonconforming units than units"
    )]
    CountAboveSize {
        file: String,
        line: u64,
        count: String,
        size: String,
    },
}

fn show(value: &str) -> String {
    if value.is_empty() {
        "an empty cell".to_string()
    } else {
        format!("\"{value}\"")
    }
}

/// A value such as `12,0026` is a decimal comma: say so, and how to read the file.
fn comma_hint(value: &str) -> &'static str {
    let v = value.trim().trim_start_matches(['-', '+']);
    let looks = v.split_once(',').is_some_and(|(a, b)| {
        !a.is_empty()
            && !b.is_empty()
            && a.bytes().all(|c| c.is_ascii_digit())
            && b.bytes().all(|c| c.is_ascii_digit())
    });
    if looks {
        "; it is written with a decimal comma, so the file looks like a semicolon-separated export with decimal commas: read it with --delimiter ';' --decimal-comma"
    } else {
        ""
    }
}

fn col_name(name: &Option<String>) -> String {
    name.as_ref()
        .map(|n| format!(" (column \"{n}\")"))
        .unwrap_or_default()
}

struct Row {
    line: u64,
    fields: Vec<String>,
}

/// Parses `text` (named `file` in messages) into subgroups.
pub fn parse(text: &str, file: &str, opts: &InputOptions) -> Result<Parsed, InputError> {
    let (header, rows) = rows_of(text, file, opts.delimiter)?;
    let cx = Context {
        file,
        header: header.as_deref(),
        decimal_comma: opts.decimal_comma,
    };
    let parsed = match opts.layout {
        Layout::Wide => wide(&cx, &rows, opts)?,
        Layout::Long => long(&cx, &rows, opts)?,
        Layout::Single => single(&cx, &rows, opts)?,
    };
    if parsed.subgroups.is_empty() {
        return Err(InputError::Empty {
            file: file.to_string(),
        });
    }
    Ok(parsed)
}

/// The rows of CSV `text` with their line numbers, and the header: a first row none of whose
/// fields is a number. Comment lines (`#`) are left out.
fn rows_of(
    text: &str,
    file: &str,
    delimiter: u8,
) -> Result<(Option<Vec<String>>, Vec<Row>), InputError> {
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .comment(Some(b'#'))
        .trim(csv::Trim::All)
        .delimiter(delimiter)
        .from_reader(text.as_bytes());
    let mut rows = Vec::new();
    for record in reader.records() {
        let record = record.map_err(|e| InputError::Csv {
            file: file.to_string(),
            line: e.position().map(|p| p.line()).unwrap_or(0),
            message: e.to_string(),
        })?;
        let line = record.position().map(|p| p.line()).unwrap_or(0);
        rows.push(Row {
            line,
            fields: record.iter().map(str::to_string).collect(),
        });
    }
    let header = match rows.first() {
        Some(first) if first.fields.iter().all(|f| f.parse::<f64>().is_err()) => {
            Some(rows.remove(0).fields)
        }
        _ => None,
    };
    Ok((header, rows))
}

struct Context<'a> {
    file: &'a str,
    header: Option<&'a [String]>,
    decimal_comma: bool,
}

impl Context<'_> {
    fn column(
        &self,
        name: &str,
        layout: &'static str,
        what: &'static str,
    ) -> Result<usize, InputError> {
        let header = self.header.ok_or_else(|| InputError::NoHeader {
            file: self.file.to_string(),
            layout,
            what,
        })?;
        header
            .iter()
            .position(|h| h == name)
            .ok_or_else(|| InputError::MissingColumn {
                file: self.file.to_string(),
                name: name.to_string(),
                available: header.to_vec(),
            })
    }

    fn name_of(&self, column: usize) -> Option<String> {
        self.header.and_then(|h| h.get(column).cloned())
    }

    fn number(&self, row: &Row, column: usize) -> Result<f64, InputError> {
        let raw = row.fields.get(column).map(String::as_str).unwrap_or("");
        let text = if self.decimal_comma && !raw.contains('.') {
            std::borrow::Cow::Owned(raw.replacen(',', ".", 1))
        } else {
            std::borrow::Cow::Borrowed(raw)
        };
        match text.parse::<f64>() {
            Ok(v) if v.is_finite() => Ok(v),
            Ok(_) => Err(InputError::NotFinite {
                file: self.file.to_string(),
                line: row.line,
                column: column + 1,
                name: self.name_of(column),
                value: raw.to_string(),
            }),
            Err(_) => Err(InputError::NotNumeric {
                file: self.file.to_string(),
                line: row.line,
                column: column + 1,
                name: self.name_of(column),
                value: raw.to_string(),
            }),
        }
    }
}

fn wide(cx: &Context, rows: &[Row], opts: &InputOptions) -> Result<Parsed, InputError> {
    let width = cx
        .header
        .map(<[String]>::len)
        .or_else(|| rows.first().map(|r| r.fields.len()))
        .unwrap_or(0);
    let columns: Vec<usize> = if opts.value_columns.is_empty() {
        (0..width).collect()
    } else {
        opts.value_columns
            .iter()
            .map(|c| cx.column(c, "wide", "reading"))
            .collect::<Result<_, _>>()?
    };
    let mut out = Parsed {
        subgroups: Vec::with_capacity(rows.len()),
        labels: Vec::with_capacity(rows.len()),
        warnings: Vec::new(),
    };
    for row in rows {
        if row.fields.len() != width {
            return Err(InputError::Ragged {
                file: cx.file.to_string(),
                line: row.line,
                expected: width,
                found: row.fields.len(),
            });
        }
        let values = columns
            .iter()
            .map(|&c| cx.number(row, c))
            .collect::<Result<Vec<_>, _>>()?;
        out.subgroups.push(values);
        out.labels.push(format!("line {}", row.line));
    }
    Ok(out)
}

fn long(cx: &Context, rows: &[Row], opts: &InputOptions) -> Result<Parsed, InputError> {
    let key_col = cx.column(
        opts.subgroup_column.as_deref().unwrap_or("subgroup"),
        "long",
        "subgroup",
    )?;
    let value_col = cx.column(
        opts.value_columns
            .first()
            .map(String::as_str)
            .unwrap_or("value"),
        "long",
        "value",
    )?;
    let mut index = std::collections::HashMap::new();
    let mut out = Parsed {
        subgroups: Vec::new(),
        labels: Vec::new(),
        warnings: Vec::new(),
    };
    for row in rows {
        let key = row.fields.get(key_col).cloned().unwrap_or_default();
        if key.is_empty() {
            return Err(InputError::Csv {
                file: cx.file.to_string(),
                line: row.line,
                message: format!(
                    "the subgroup column \"{}\" is empty",
                    cx.name_of(key_col).unwrap_or_default()
                ),
            });
        }
        let v = cx.number(row, value_col)?;
        let slot = *index.entry(key.clone()).or_insert_with(|| {
            out.subgroups.push(Vec::new());
            out.labels.push(key);
            out.subgroups.len() - 1
        });
        out.subgroups[slot].push(v);
    }
    Ok(out)
}

fn single(cx: &Context, rows: &[Row], opts: &InputOptions) -> Result<Parsed, InputError> {
    let size = opts.subgroup_size.unwrap_or(1);
    if size == 0 || size > crate::stats::constants::MAX_SIZE {
        return Err(InputError::SubgroupSize {
            file: cx.file.to_string(),
            size,
            why: "it must be between 1 and 100",
        });
    }
    let col = match (opts.value_columns.first(), cx.header) {
        (Some(name), _) => cx.column(name, "single", "value")?,
        (None, Some(h)) if h.len() == 1 => 0,
        (None, None) if rows.first().is_none_or(|r| r.fields.len() == 1) => 0,
        (None, h) => {
            return Err(InputError::WhichColumn {
                file: cx.file.to_string(),
                found: h
                    .map(<[String]>::len)
                    .unwrap_or_else(|| rows[0].fields.len()),
            });
        }
    };
    let mut out = Parsed {
        subgroups: Vec::new(),
        labels: Vec::new(),
        warnings: Vec::new(),
    };
    let whole = rows.len() / size * size;
    for chunk in rows[..whole].chunks(size) {
        let values = chunk
            .iter()
            .map(|r| cx.number(r, col))
            .collect::<Result<Vec<_>, _>>()?;
        out.subgroups.push(values);
        out.labels.push(format!("line {}", chunk[0].line));
    }
    let left = rows.len() - whole;
    if left > 0 {
        // Check them anyway, so a bad value is never silently ignored.
        for r in &rows[whole..] {
            cx.number(r, col)?;
        }
        out.warnings.push(format!(
            "the last {left} reading(s) (from line {}) do not fill a subgroup of {size} and were left out",
            rows[whole].line
        ));
    }
    Ok(out)
}

/// Options for [`parse_counts`]: the columns of an attribute chart's samples.
#[derive(Debug, Clone, PartialEq)]
pub struct CountOptions {
    /// The column with the count found (nonconforming units, or defects).
    pub count_column: String,
    /// The column with the units inspected; without it every sample is one unit (c charts).
    pub size_column: Option<String>,
    /// Counts of nonconforming units, which cannot exceed the units inspected (p and np).
    pub proportion: bool,
    pub delimiter: u8,
    pub decimal_comma: bool,
}

/// The samples of an attribute chart read from a file: one row per sample.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ParsedCounts {
    pub samples: Vec<crate::stats::attributes::AttributeSample>,
    /// The line each sample is on.
    pub lines: Vec<u64>,
}

/// Reads an attribute chart's samples: a header row naming the count column (and the size
/// column), then one row per sample. A count must be whole and zero or more, a size more than
/// zero (whole for parts), and a count of nonconforming parts no more than the parts; each
/// error names the file, line, column and value.
pub fn parse_counts(
    text: &str,
    file: &str,
    opts: &CountOptions,
) -> Result<ParsedCounts, InputError> {
    let (header, rows) = rows_of(text, file, opts.delimiter)?;
    let cx = Context {
        file,
        header: header.as_deref(),
        decimal_comma: opts.decimal_comma,
    };
    let count_col = cx.column(&opts.count_column, "counts", "count")?;
    let size_col = opts
        .size_column
        .as_deref()
        .map(|c| cx.column(c, "counts", "size"))
        .transpose()?;
    let width = cx.header.map_or(0, <[String]>::len);
    let mut out = ParsedCounts {
        samples: Vec::with_capacity(rows.len()),
        lines: Vec::with_capacity(rows.len()),
    };
    for row in &rows {
        if row.fields.len() != width {
            return Err(InputError::Ragged {
                file: file.to_string(),
                line: row.line,
                expected: width,
                found: row.fields.len(),
            });
        }
        let bad = |column: usize, what: &'static str| InputError::BadCount {
            file: file.to_string(),
            line: row.line,
            column: column + 1,
            name: cx.name_of(column),
            value: row.fields.get(column).cloned().unwrap_or_default(),
            what,
        };
        let count = cx.number(row, count_col)?;
        if count < 0.0 || count.fract() != 0.0 {
            return Err(bad(count_col, "a count: a whole number of zero or more"));
        }
        let size = match size_col {
            Some(c) => {
                let n = cx.number(row, c)?;
                if n <= 0.0 {
                    return Err(bad(c, "a number of units inspected: more than zero"));
                }
                if opts.proportion && n.fract() != 0.0 {
                    return Err(bad(c, "a number of parts inspected: a whole number"));
                }
                n
            }
            None => 1.0,
        };
        if opts.proportion && count > size {
            return Err(InputError::CountAboveSize {
                file: file.to_string(),
                line: row.line,
                count: row.fields[count_col].clone(),
                size: size_col.map_or("1".into(), |c| row.fields[c].clone()),
            });
        }
        out.samples
            .push(crate::stats::attributes::AttributeSample { count, size });
        out.lines.push(row.line);
    }
    if out.samples.is_empty() {
        return Err(InputError::Empty {
            file: file.to_string(),
        });
    }
    Ok(out)
}
