//! The test ledger: one line of JSON per opening of a test split, appended
//! under an exclusive file lock and flushed to disk before the lock is
//! released, so concurrent runs never lose or interleave an entry. The file is
//! meant to be committed beside the spec; it is not part of any signed run.

use std::io::{BufRead, Read, Seek, SeekFrom, Write};
use std::path::Path;

use crate::error::{Error, Result};

/// One opening of a test split.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct Entry {
    /// blake3 of the test split's manifest.
    pub test_manifest: String,
    /// blake3 of the spec that opened it.
    pub spec_blake3: String,
    /// The candidate chosen on validation before the opening.
    pub chosen: String,
    /// When, UTC, RFC 3339.
    pub opened_utc: String,
    /// The tool and version.
    pub tool: String,
}

/// Appends `entry` and returns every entry now in the ledger, in order.
pub fn append(path: &Path, entry: &Entry) -> Result<Vec<Entry>> {
    let mut f = std::fs::OpenOptions::new()
        .create(true)
        .read(true)
        .append(true)
        .open(path)
        .map_err(|e| Error::io(path, "opening the test ledger", e))?;
    let meta = f
        .metadata()
        .map_err(|e| Error::io(path, "opening the test ledger", e))?;
    crate::error::check_regular(path, "opening the test ledger", &meta)?;
    f.lock()
        .map_err(|e| Error::io(path, "locking the test ledger", e))?;
    let result = (|| {
        f.seek(SeekFrom::Start(0))
            .map_err(|e| Error::io(path, "reading the test ledger", e))?;
        let mut text = Vec::new();
        (&f).read_to_end(&mut text)
            .map_err(|e| Error::io(path, "reading the test ledger", e))?;
        let mut entries = read_from(&text[..], path)?;
        // A last line without its newline (an editor, a hand merge) would
        // otherwise have this entry glued onto it.
        let mut line = if text.last().is_some_and(|&b| b != b'\n') {
            String::from("\n")
        } else {
            String::new()
        };
        line.push_str(
            &serde_json::to_string(entry)
                .map_err(|e| Error::internal(format!("serialising a ledger entry: {e}")))?,
        );
        line.push('\n');
        if let Err(e) = f.write_all(line.as_bytes()).and_then(|_| f.sync_all()) {
            // A write cut short (a full disk) would leave half an entry that
            // no later run could read: cut the ledger back to what it was
            // (the lock is still held, so nothing else was appended).
            let _ = f.set_len(text.len() as u64).and_then(|_| f.sync_all());
            return Err(Error::io(path, "appending to the test ledger", e));
        }
        entries.push(entry.clone());
        Ok(entries)
    })();
    let _ = f.unlock();
    result
}

fn read_from(r: impl BufRead, path: &Path) -> Result<Vec<Entry>> {
    let mut out = Vec::new();
    for (i, line) in r.lines().enumerate() {
        let line = line.map_err(|e| Error::io(path, "reading the test ledger", e))?;
        if line.trim().is_empty() {
            continue;
        }
        let e: Entry = serde_json::from_str(&line).map_err(|e| Error::Data {
            path: path.to_path_buf(),
            column: None,
            message: format!("a test-ledger entry is not readable ({e}); the ledger is append-only, restore it from version control"),
            lines: vec![i as u64 + 1],
            total: 1,
            unit: crate::error::RowUnit::Line,
        })?;
        out.push(e);
    }
    Ok(out)
}

/// Refuses a ledger path that exists and is not a regular file (`/dev/full`
/// would be read without end, a fifo would block); an absent ledger is fine,
/// the first opening creates it. Checked before a final run does any work.
pub fn check_path(path: &Path) -> Result<()> {
    match std::fs::metadata(path) {
        Ok(meta) => crate::error::check_regular(path, "opening the test ledger", &meta),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(()),
        Err(e) => Err(Error::io(path, "opening the test ledger", e)),
    }
}

/// Every entry of the ledger at `path` (none when it does not exist).
pub fn read(path: &Path) -> Result<Vec<Entry>> {
    check_path(path)?;
    match std::fs::File::open(path) {
        Ok(f) => read_from(std::io::BufReader::new(f), path),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(vec![]),
        Err(e) => Err(Error::io(path, "reading the test ledger", e)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn entry(spec: &str) -> Entry {
        Entry {
            test_manifest: "m".into(),
            spec_blake3: spec.into(),
            chosen: "c".into(),
            opened_utc: "2026-12-01T00:00:00Z".into(),
            tool: "anomark".into(),
        }
    }

    #[test]
    fn appends_and_reads_back() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("l.jsonl");
        assert_eq!(append(&p, &entry("a")).unwrap().len(), 1);
        let all = append(&p, &entry("b")).unwrap();
        assert_eq!(
            all.iter()
                .map(|e| e.spec_blake3.as_str())
                .collect::<Vec<_>>(),
            ["a", "b"]
        );
        assert_eq!(read(&p).unwrap(), all);
    }

    #[test]
    fn concurrent_appends_lose_nothing() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("l.jsonl");
        std::thread::scope(|s| {
            for t in 0..8 {
                let p = p.clone();
                s.spawn(move || {
                    for k in 0..25 {
                        append(&p, &entry(&format!("{t}-{k}"))).unwrap();
                    }
                });
            }
        });
        assert_eq!(read(&p).unwrap().len(), 200);
    }

    /// Issue 25: an entry appended to a ledger whose last line had no
    /// newline was glued onto that line, and the next run could not read it.
    #[test]
    fn appending_after_a_last_line_without_newline_starts_a_new_line() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("l.jsonl");
        append(&p, &entry("a")).unwrap();
        let text = std::fs::read_to_string(&p).unwrap();
        std::fs::write(&p, text.trim_end_matches('\n')).unwrap();
        assert_eq!(append(&p, &entry("b")).unwrap().len(), 2);
        assert_eq!(append(&p, &entry("c")).unwrap().len(), 3);
        let all = read(&p).unwrap();
        assert_eq!(
            all.iter()
                .map(|e| e.spec_blake3.as_str())
                .collect::<Vec<_>>(),
            ["a", "b", "c"]
        );
        assert!(std::fs::read_to_string(&p).unwrap().ends_with("}\n"));
    }

    #[test]
    fn a_damaged_line_is_named() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("l.jsonl");
        append(&p, &entry("a")).unwrap();
        std::fs::OpenOptions::new()
            .append(true)
            .open(&p)
            .unwrap()
            .write_all(b"{oops\n")
            .unwrap();
        let e = read(&p).unwrap_err().to_string();
        assert!(e.contains("line 2") && e.contains("not readable"), "{e}");
    }
}
