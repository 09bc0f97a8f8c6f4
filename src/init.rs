//! `anomark init`: a first spec from a data file.
//!
//! Reads the header and the first [`SAMPLE_ROWS`] rows of one CSV or Parquet
//! file (through [`crate::data::sample`]) and writes a commented spec that
//! `anomark check` accepts as written: the numeric columns as features (a
//! column that looks like an id, a timestamp or a constant is left out, with a
//! comment saying why), the label column and which of its two values marks an
//! anomaly, the id column when one is evident, a seeded protocol split, both
//! Gaussian detectors, `max-f1`, and a `card:` block with placeholders. When
//! it cannot decide (no column with two values, no numeric column, two
//! equally common label values) it says what it needs and stops with the
//! usage exit code. It never overwrites a file. It fits nothing and must not
//! read more than the bounded sample.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::io::Write as _;
use std::path::{Component, Path, PathBuf};

use crate::data::{self, Format, SampleColumn};
use crate::error::{Error, Result};

/// The rows `init` reads: the first 10,000 of the file (the header and these
/// rows only, so a file of any size is sampled in bounded time and memory;
/// the cost grows with the number of columns, which the file fixes).
pub const SAMPLE_ROWS: usize = 10_000;

/// The seed written into the protocol split (any fixed value does; the spec
/// records it, so the split is the same on every run).
pub const SEED: u64 = 1;

/// What `anomark init` needs.
#[derive(Debug, Clone)]
pub struct InitOptions {
    /// The data file (CSV or Parquet).
    pub data: PathBuf,
    /// The label column, when the user names it.
    pub label: Option<String>,
    /// The label value that marks a known anomaly, when the user names it.
    pub anomaly: Option<String>,
    /// Where to write the spec (never overwritten); `None` for stdout.
    pub out: Option<PathBuf>,
}

/// What `init` made of one column.
#[derive(Debug, Clone, PartialEq)]
enum Role {
    Feature { missing: usize },
    Label,
    Id,
    Left(String),
}

/// Names that suggest a label column (lowercase, matched as a substring,
/// except `y`, which must be the whole name). Common practice, no source.
const LABEL_HINTS: [&str; 14] = [
    "label", "class", "target", "anomal", "outlier", "fault", "defect", "fail", "diagnos",
    "outcome", "result", "status", "fraud", "leak",
];

fn looks_like_label(name: &str) -> bool {
    let n = name.to_ascii_lowercase();
    n == "y" || LABEL_HINTS.iter().any(|h| n.contains(h))
}

/// An identifier by its name: `id`, `…_id`, `…-id`, `…Id`, `uuid`, `index`, `row`.
fn looks_like_id(name: &str) -> bool {
    let n = name.to_ascii_lowercase();
    matches!(
        n.as_str(),
        "id" | "uuid" | "guid" | "index" | "row" | "row_id" | "rowid" | "serial" | "key"
    ) || n.ends_with("_id")
        || n.ends_with("-id")
        || n.ends_with(" id")
        || n.ends_with(".id")
        || name.ends_with("Id")
        || name.ends_with("ID") && name.len() > 2
}

/// A timestamp by its name: `time`, `timestamp`, `date`, `…_at`, `…_date`, `…_ts`.
/// A reading such as `fill_time_ms` is a duration, not a time, and stays.
fn looks_like_time(name: &str) -> bool {
    let n = name.to_ascii_lowercase();
    matches!(
        n.as_str(),
        "time" | "timestamp" | "date" | "datetime" | "epoch" | "ts" | "unix_time"
    ) || [
        "_at",
        "_date",
        "_ts",
        "_timestamp",
        "_datetime",
        "_epoch",
        "-at",
        "-date",
    ]
    .iter()
    .any(|s| n.ends_with(s))
}

/// Whole numbers that read as Unix times between 2001 and 2099, in seconds
/// or milliseconds (1e9 s is 2001-09-09; 4.1e9 s is in 2099).
fn values_like_unix_time(v: &[f64]) -> bool {
    let secs = |x: f64| (1e9..4.1e9).contains(&x);
    let millis = |x: f64| (1e12..4.1e12).contains(&x);
    !v.is_empty()
        && v.iter().all(|x| x.fract() == 0.0)
        && (v.iter().all(|&x| secs(x)) || v.iter().all(|&x| millis(x)))
}

/// A column's numbers, when every present value is one (`None` otherwise).
fn numbers(c: &SampleColumn) -> Option<Vec<Option<f64>>> {
    if let Some(n) = &c.numbers {
        return Some(n.clone());
    }
    let mut out = Vec::with_capacity(c.text.len());
    let mut any = false;
    for v in &c.text {
        match v.as_deref().map(str::trim) {
            None | Some("") => out.push(None),
            Some(s) => match s.parse::<f64>() {
                Ok(x) if x.is_finite() => {
                    any = true;
                    out.push(Some(x));
                }
                _ => return None,
            },
        }
    }
    any.then_some(out)
}

/// The distinct present text values and their counts (sorted by value).
fn counts(c: &SampleColumn) -> BTreeMap<&str, usize> {
    let mut m = BTreeMap::new();
    for v in c.text.iter().flatten() {
        if !v.is_empty() {
            *m.entry(v.as_str()).or_insert(0) += 1;
        }
    }
    m
}

fn usage(message: String) -> Error {
    Error::Usage { message }
}

/// A YAML double-quoted scalar (JSON string syntax is valid YAML).
fn q(s: &str) -> String {
    serde_json::to_string(s).unwrap_or_else(|_| format!("\"{s}\""))
}

/// `to` relative to the directory `from` (both made absolute first); `to`
/// itself when they share no root.
fn relative(from: &Path, to: &Path) -> PathBuf {
    let (Ok(from), Ok(to)) = (std::path::absolute(from), std::path::absolute(to)) else {
        return to.to_path_buf();
    };
    fn clean(p: &Path) -> Vec<Component<'_>> {
        p.components()
            .filter(|c| !matches!(c, Component::CurDir))
            .collect()
    }
    let (f, t) = (clean(&from), clean(&to));
    if f.first() != t.first() {
        return to;
    }
    let common = f.iter().zip(&t).take_while(|(a, b)| a == b).count();
    let mut out = PathBuf::new();
    for _ in common..f.len() {
        out.push("..");
    }
    for c in &t[common..] {
        out.push(c.as_os_str());
    }
    out
}

/// The chosen label: its column index, the normal and the anomaly value, and
/// the note for the spec.
struct Label {
    index: usize,
    normal: String,
    anomaly: String,
    note: Vec<String>,
}

fn choose_label(
    file: &str,
    cols: &[SampleColumn],
    opts: &InitOptions,
    rows_note: &str,
) -> Result<Label> {
    let two: Vec<usize> = (0..cols.len())
        .filter(|&i| counts(&cols[i]).len() == 2)
        .collect();
    let mut note = Vec::new();
    let index = match &opts.label {
        Some(name) => {
            let Some(i) = cols.iter().position(|c| &c.name == name) else {
                let names: Vec<String> = cols.iter().map(|c| format!("`{}`", c.name)).collect();
                return Err(usage(format!(
                    "`{file}` has no column `{name}` (`--label`); its columns are {}",
                    names.join(", ")
                )));
            };
            let n = counts(&cols[i]).len();
            if n != 2 {
                let sorted = if n < 2 && rows_note.starts_with("the first") {
                    "; `init` reads no further, so if the file is sorted by this column, \
                     shuffle its rows first or write the label by hand"
                } else {
                    ""
                };
                return Err(usage(format!(
                    "`{file}`: the label column `{name}` has {n} distinct value(s) in {rows_note}; \
                     anomark needs exactly two, one for normal rows and one for known anomalies{sorted}"
                )));
            }
            note.push(format!("the label column `{name}` was given (--label)"));
            i
        }
        None => {
            let hinted: Vec<usize> = two
                .iter()
                .copied()
                .filter(|&i| looks_like_label(&cols[i].name))
                .collect();
            let pick = match (hinted.as_slice(), two.as_slice()) {
                ([i], _) => *i,
                ([], [i]) => *i,
                ([], []) => {
                    return Err(usage(format!(
                        "`{file}`: no column has exactly two distinct values in {rows_note}; \
                         anomark needs a label column with one value for normal rows and one \
                         for known anomalies: add one, or name it with `--label COLUMN`"
                    )))
                }
                (many, _) => {
                    let list = if many.is_empty() { &two[..] } else { many };
                    let names: Vec<String> = list
                        .iter()
                        .map(|&i| format!("`{}`", cols[i].name))
                        .collect();
                    return Err(usage(format!(
                        "`{file}`: more than one column could be the label ({}); name it with \
                         `--label COLUMN`",
                        names.join(", ")
                    )));
                }
            };
            note.push(format!(
                "GUESSED: `{}` is the label column: it has two distinct values in {rows_note}{}",
                cols[pick].name,
                if looks_like_label(&cols[pick].name) {
                    " and its name reads like a label"
                } else {
                    ""
                }
            ));
            pick
        }
    };
    let c = counts(&cols[index]);
    let mut vals: Vec<(&str, usize)> = c.into_iter().collect();
    let (normal, anomaly) = match &opts.anomaly {
        Some(a) => {
            let Some(k) = vals.iter().position(|(v, _)| v == a) else {
                return Err(usage(format!(
                    "`{file}`: `--anomaly {a}` is not a value of the label column `{}` \
                     (its values are `{}` and `{}`)",
                    cols[index].name, vals[0].0, vals[1].0
                )));
            };
            note.push(format!("`{a}` marks a known anomaly (--anomaly)"));
            (vals[1 - k].0.to_string(), a.clone())
        }
        None => {
            vals.sort_by(|a, b| a.1.cmp(&b.1).then(a.0.cmp(b.0)));
            if vals[0].1 == vals[1].1 {
                return Err(usage(format!(
                    "`{file}`: the label column `{}` has `{}` and `{}` equally often in \
                     {rows_note}, so the rarer cannot mark the anomalies; name the anomaly \
                     value with `--anomaly VALUE`",
                    cols[index].name, vals[0].0, vals[1].0
                )));
            }
            note.push(format!(
                "GUESSED: `{}` marks a known anomaly because it is the rarer value \
                 ({} of {} labelled rows in {rows_note}); swap `normal` and `anomaly` if not",
                vals[0].0,
                vals[0].1,
                vals[0].1 + vals[1].1
            ));
            (vals[1].0.to_string(), vals[0].0.to_string())
        }
    };
    Ok(Label {
        index,
        normal,
        anomaly,
        note,
    })
}

/// Builds the spec text for `opts` (reading the sample) without writing it.
pub fn spec_text(opts: &InitOptions) -> Result<String> {
    let data_path = &opts.data;
    let file = data_path.display().to_string();
    let ext = data_path
        .extension()
        .and_then(|e| e.to_str())
        .unwrap_or("")
        .to_ascii_lowercase();
    let format = match ext.as_str() {
        "csv" => Format::Csv,
        "parquet" | "pq" => Format::Parquet,
        _ => {
            return Err(usage(format!(
                "`{file}` is neither `.csv` nor `.parquet`; `anomark init` reads one file of \
                 either format"
            )))
        }
    };
    if !data_path.is_file() {
        return Err(Error::io(
            data_path,
            "reading data",
            std::io::Error::new(std::io::ErrorKind::NotFound, "no such file"),
        ));
    }
    let sample = data::sample(data_path, format, SAMPLE_ROWS)?;
    let cols = &sample.columns;
    let rows_note = if sample.rows < SAMPLE_ROWS {
        format!("all {} rows", sample.rows)
    } else {
        format!("the first {SAMPLE_ROWS} rows")
    };
    let label = choose_label(&file, cols, opts, &rows_note)?;

    // Each column's role, in file order.
    let mut id: Option<usize> = None;
    let mut roles = Vec::with_capacity(cols.len());
    for (i, c) in cols.iter().enumerate() {
        if i == label.index {
            roles.push(Role::Label);
            continue;
        }
        let present: Vec<&str> = c.text.iter().flatten().map(String::as_str).collect();
        let all_distinct = present.len() == sample.rows
            && counts(c).len() == present.len()
            && present.iter().all(|s| !s.is_empty());
        if id.is_none() && looks_like_id(&c.name) && all_distinct && sample.rows > 0 {
            id = Some(i);
            roles.push(Role::Id);
            continue;
        }
        let Some(nums) = numbers(c) else {
            let why = if present.is_empty() || present.iter().all(|s| s.is_empty()) {
                "empty in the sample".to_string()
            } else if looks_like_time(&c.name)
                || present.first().is_some_and(|s| {
                    s.len() >= 10 && s.as_bytes()[4] == b'-' && s.as_bytes()[7] == b'-'
                })
            {
                "text that looks like a date or time, not a number (a `time` split could use it)"
                    .to_string()
            } else if looks_like_id(&c.name) {
                "an identifier that repeats (a `groups` split could use it)".to_string()
            } else {
                "text, not a number".to_string()
            };
            roles.push(Role::Left(why));
            continue;
        };
        let present_nums: Vec<f64> = nums.iter().flatten().copied().collect();
        let missing = nums.len() - present_nums.len();
        let distinct = {
            let mut v: Vec<u64> = present_nums.iter().map(|x| x.to_bits()).collect();
            v.sort_unstable();
            v.dedup();
            v.len()
        };
        let counting = present_nums.len() > 1
            && present_nums.windows(2).all(|w| w[1] - w[0] == 1.0)
            && present_nums[0].fract() == 0.0;
        let why = if looks_like_id(&c.name) {
            Some("its name reads like an identifier".to_string())
        } else if counting {
            Some("it counts up by one from row to row, like a row number".to_string())
        } else if looks_like_time(&c.name) {
            Some("its name reads like a timestamp (a `time` split could use it)".to_string())
        } else if values_like_unix_time(&present_nums) {
            Some("its values look like Unix times (a `time` split could use it)".to_string())
        } else if distinct <= 1 {
            Some("it is constant in the sample, so it cannot tell rows apart".to_string())
        } else {
            None
        };
        roles.push(match why {
            Some(w) => Role::Left(w),
            None => Role::Feature { missing },
        });
    }
    if !roles.iter().any(|r| matches!(r, Role::Feature { .. })) {
        return Err(usage(format!(
            "`{file}`: no column can be a feature; anomark needs at least one numeric column \
             that is not the label, an id, a timestamp or a constant ({rows_note} read)"
        )));
    }

    // The data path as the spec will read it: relative to the spec's directory.
    let spec_dir = match &opts.out {
        Some(o) => o
            .parent()
            .filter(|p| !p.as_os_str().is_empty())
            .unwrap_or(Path::new("."))
            .to_path_buf(),
        None => PathBuf::from("."),
    };
    let written_path = relative(&spec_dir, data_path);
    let written = written_path.to_string_lossy().replace('\\', "/");
    let stem = data_path
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "data".into());
    let slug: String = stem
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                c
            } else {
                '-'
            }
        })
        .collect();

    let mut s = String::new();
    let w = &mut s;
    let _ = writeln!(
        w,
        "# yaml-language-server: $schema=anomark-spec.schema.json"
    );
    let _ = writeln!(
        w,
        "# Written by `anomark init` from the header and {rows_note} of `{}`.",
        data_path
            .file_name()
            .map(|f| f.to_string_lossy().into_owned())
            .unwrap_or_default()
    );
    let _ = writeln!(
        w,
        "# Read every comment, fill in the card, then `anomark check` this file."
    );
    let _ = writeln!(w, "format: 1\n\ndata:");
    let _ = writeln!(w, "  # relative to this spec file");
    let _ = writeln!(w, "  path: {}", q(&written));
    if let Some(i) = id {
        let _ = writeln!(
            w,
            "  # its name reads like an identifier and every value in the sample is distinct"
        );
        let _ = writeln!(w, "  id-column: {}", q(&cols[i].name));
    }
    let _ = writeln!(w, "  label:");
    for n in &label.note {
        let _ = writeln!(w, "    # {n}");
    }
    let _ = writeln!(w, "    column: {}", q(&cols[label.index].name));
    let _ = writeln!(w, "    normal: {}", q(&label.normal));
    let _ = writeln!(w, "    anomaly: {}", q(&label.anomaly));
    let with_missing: Vec<&str> = roles
        .iter()
        .zip(cols)
        .filter_map(|(r, c)| match r {
            Role::Feature { missing } if *missing > 0 => Some(c.name.as_str()),
            _ => None,
        })
        .collect();
    if !with_missing.is_empty() {
        let _ = writeln!(
            w,
            "  # empty values in the sample ({}): such rows are left out and counted; \
             `refuse` would stop the run instead",
            with_missing
                .iter()
                .map(|n| format!("`{n}`"))
                .collect::<Vec<_>>()
                .join(", ")
        );
        let _ = writeln!(w, "  missing-values: drop-row");
    }
    let _ = writeln!(w, "  features:");
    for (r, c) in roles.iter().zip(cols) {
        match r {
            Role::Feature { .. } => {
                let _ = writeln!(w, "    - {}", q(&c.name));
            }
            Role::Left(why) => {
                let _ = writeln!(w, "    # left out: {}: {why}", q(&c.name));
            }
            Role::Label | Role::Id => {}
        }
    }
    let _ = write!(
        w,
        "
# Seeded, stratified, content-hashed split: train holds normal rows only;
# the known anomalies are shared between validation and test.
split:
  protocol:
    seed: {SEED}
    normal: {{train: 0.6, validation: 0.2, test: 0.2}}
    anomaly: {{validation: 0.5, test: 0.5}}

detectors:
  - independent-gaussian
  - multivariate-gaussian

# the threshold with the highest F1 on validation
threshold: max-f1

# Placeholders: replace every <...> before a run others will read.
card:
  title: {title}
  owner: \"<who answers for this detector>\"
  intended-use: >-
    <What the detector is for: which rows it screens, and what happens to a
    flagged row.>
  out-of-scope-uses:
    - \"<a use this detector is not meant for>\"
  # true when a wrong decision can hurt someone: the card then carries a
  # caution that the detector is a screening aid, not a substitute for
  # inspections, the applicable codes and licensed engineering judgement
  safety-relevant: false

# the run directory, relative to this spec file (`anomark run --out` overrides it)
output: {output}
",
        title = q(&format!("<title> (anomaly screen for {stem})")),
        output = q(&format!("runs/{slug}")),
    );
    Ok(s)
}

/// Runs `anomark init`: the spec text for stdout, or an empty string once the
/// spec is written to `opts.out` (created, never overwritten).
pub fn init(opts: &InitOptions) -> Result<String> {
    let exists = |p: &Path| Error::Output {
        path: p.to_path_buf(),
        message: "already exists; `anomark init` never overwrites a file".into(),
    };
    if let Some(out) = &opts.out {
        if out.exists() {
            return Err(exists(out));
        }
    }
    let text = spec_text(opts)?;
    let Some(out) = &opts.out else {
        return Ok(text);
    };
    let dir = out
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let mut tmp = tempfile::Builder::new()
        .prefix(".anomark-init-")
        .tempfile_in(dir)
        .map_err(|e| Error::io(out, "writing the spec", e))?;
    tmp.write_all(text.as_bytes())
        .and_then(|_| tmp.as_file().sync_all())
        .map_err(|e| Error::io(out, "writing the spec", e))?;
    tmp.persist_noclobber(out).map_err(|e| {
        if e.error.kind() == std::io::ErrorKind::AlreadyExists {
            exists(out)
        } else {
            Error::io(out, "writing the spec", e.error)
        }
    })?;
    Ok(String::new())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_are_read_as_roles() {
        assert!(looks_like_id("housing_id"));
        assert!(looks_like_id("id"));
        assert!(looks_like_id("sampleId"));
        assert!(!looks_like_id("acid"));
        assert!(!looks_like_time("cast_time"));
        assert!(looks_like_time("timestamp"));
        assert!(looks_like_time("created_at"));
        assert!(!looks_like_time("fill_time_ms"));
        assert!(looks_like_label("diagnosis"));
        assert!(looks_like_label("leak_test"));
        assert!(!looks_like_label("die_temp_c"));
    }

    #[test]
    fn unix_times_are_recognised_in_seconds_and_milliseconds() {
        // 1_764_892_800 s is 2025-12-05T00:00:00Z (date arithmetic, from memory).
        assert!(values_like_unix_time(&[1_764_892_800.0, 1_764_892_860.0]));
        assert!(values_like_unix_time(&[1_764_892_800_000.0]));
        assert!(!values_like_unix_time(&[80.4, 77.4]));
        assert!(!values_like_unix_time(&[1_764_892_800.5]));
    }

    #[test]
    fn relative_paths_climb_and_descend() {
        assert_eq!(
            relative(Path::new("a/specs"), Path::new("a/data/x.csv")),
            PathBuf::from("../data/x.csv")
        );
        assert_eq!(
            relative(Path::new("."), Path::new("x.csv")),
            PathBuf::from("x.csv")
        );
    }
}
