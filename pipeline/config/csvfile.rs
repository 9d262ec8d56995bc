//! Small CSV inputs written or exported by people (capture lists, oximeter
//! logs), read with positions so that every problem can be reported as
//! `file:line:column`. A Parquet file can stand in where a table may be
//! large (the spectra table): its cells get the positions the same table
//! would have as CSV with a header line, line = row + 1 counting the first
//! data row as row 1, column = the column's number.

use std::path::Path;

use super::diag::{Findings, Mark};

/// A CSV file read into memory: the header and the records with positions.
pub struct CsvTable {
    pub header: Vec<String>,
    pub rows: Vec<CsvRow>,
}

pub struct CsvRow {
    pub line: usize,
    /// (text, 1-based column of the field's first character).
    pub fields: Vec<(String, usize)>,
}

impl CsvRow {
    pub fn field(&self, idx: usize) -> Option<(&str, Mark)> {
        self.fields
            .get(idx)
            .map(|(t, c)| (t.as_str(), Mark::new(self.line, *c)))
    }
}

impl CsvTable {
    /// Index of a named column; a missing one is a finding naming the columns present.
    pub fn column(
        &self,
        file: &Path,
        name: &str,
        what: &str,
        findings: &mut Findings,
    ) -> Option<usize> {
        let idx = self.header.iter().position(|h| h.trim() == name);
        if idx.is_none() {
            let present: Vec<&str> = self.header.iter().map(|s| s.as_str()).collect();
            let hint = super::diag::suggest(name, &present);
            findings
                .error(
                    file,
                    Some(Mark::new(1, 1)),
                    format!("{what}: no column `{name}` in the header"),
                )
                .hint(hint);
        }
        idx
    }
}

/// Reads a CSV file with a header line. Comment lines starting with `#` are skipped.
pub fn read_csv(path: &Path, findings: &mut Findings) -> Option<CsvTable> {
    let bytes = match std::fs::read(path) {
        Ok(b) => b,
        Err(e) => {
            findings
                .error(path, None, format!("cannot read the file: {e}"))
                .hint("check the path in the study file");
            return None;
        }
    };
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .comment(Some(b'#'))
        .from_reader(&bytes[..]);
    let header: Vec<String> = match rdr.headers() {
        Ok(h) => h.iter().map(|s| s.trim().to_string()).collect(),
        Err(e) => {
            findings.error(
                path,
                Some(Mark::new(1, 1)),
                format!("cannot read the header line: {e}"),
            );
            return None;
        }
    };
    if header.iter().all(|h| h.is_empty()) {
        findings
            .error(path, Some(Mark::new(1, 1)), "the file has no header line")
            .hint("the first line must name the columns");
        return None;
    }
    let mut rows = Vec::new();
    let mut record = csv::StringRecord::new();
    loop {
        match rdr.read_record(&mut record) {
            Ok(false) => break,
            Ok(true) => {
                let pos = record
                    .position()
                    .expect("records read from a reader have positions");
                // The position is where reading began, before any skipped
                // comment or blank lines: step over those.
                let mut line = pos.line() as usize;
                let mut start = pos.byte() as usize;
                while start < bytes.len() && matches!(bytes[start], b'#' | b'\n' | b'\r') {
                    let next = bytes[start..]
                        .iter()
                        .position(|b| *b == b'\n')
                        .map(|i| start + i + 1)
                        .unwrap_or(bytes.len());
                    if bytes[start] != b'\r' || bytes.get(start + 1) == Some(&b'\n') {
                        line += 1;
                    }
                    start = next;
                }
                // Column = characters from the start of the line to the field.
                let starts = field_columns(&bytes[start..]);
                let fields = (0..record.len())
                    .map(|i| {
                        (
                            record[i].trim().to_string(),
                            starts.get(i).copied().unwrap_or(1),
                        )
                    })
                    .collect();
                rows.push(CsvRow { line, fields });
            }
            Err(e) => {
                let mark = e.position().map(|p| Mark::new(p.line() as usize, 1));
                findings
                    .error(path, mark, format!("cannot read this line: {e}"))
                    .hint("the file must be UTF-8 CSV with a comma between fields");
                return None;
            }
        }
    }
    Some(CsvTable { header, rows })
}

/// Reads a table that is either CSV or, by the `.parquet` extension, Parquet.
pub(crate) fn read_table(path: &Path, findings: &mut Findings) -> Option<CsvTable> {
    if path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("parquet"))
    {
        read_parquet(path, findings)
    } else {
        read_csv(path, findings)
    }
}

/// Reads a Parquet file into the same cells a CSV export would have.
fn read_parquet(path: &Path, findings: &mut Findings) -> Option<CsvTable> {
    if let Err(e) = std::fs::metadata(path) {
        findings
            .error(path, None, format!("cannot read the file: {e}"))
            .hint("check the path in the study file");
        return None;
    }
    let (header, cells) = match crate::tables::read_parquet_cells(path) {
        Ok(t) => t,
        Err(crate::tables::CellsError::Unreadable(e)) => {
            findings
                .error(path, None, format!("cannot read the file as Parquet: {e}"))
                .hint("write the table as Parquet, or as CSV with a `.csv` name");
            return None;
        }
        Err(crate::tables::CellsError::Column { index, name, dtype }) => {
            findings
                .error(
                    path,
                    Some(Mark::new(1, index + 1)),
                    format!("column `{name}` holds {dtype}, which this table cannot use"),
                )
                .hint("store text, whole numbers or floating-point numbers");
            return None;
        }
    };
    let header: Vec<String> = header.iter().map(|n| n.trim().to_string()).collect();
    let height = cells.first().map_or(0, Vec::len);
    // Column-major cells are moved, not copied, into rows: the table may be large.
    let mut columns: Vec<std::vec::IntoIter<String>> =
        cells.into_iter().map(Vec::into_iter).collect();
    let rows = (0..height)
        .map(|r| CsvRow {
            line: r + 2,
            fields: columns
                .iter_mut()
                .enumerate()
                .map(|(c, col)| (trimmed(col.next().unwrap_or_default()), c + 1))
                .collect(),
        })
        .collect();
    Some(CsvTable { header, rows })
}

/// The text without surrounding blanks, reusing its buffer when it has none.
fn trimmed(s: String) -> String {
    if s.trim().len() == s.len() {
        s
    } else {
        s.trim().to_string()
    }
}

/// 1-based character columns at which the fields of the line starting at
/// `raw` begin (commas inside quotes do not split).
fn field_columns(raw: &[u8]) -> Vec<usize> {
    // Bytes, not a decoded copy of the rest of the file: decoding from here
    // to the end for every row made reading quadratic in the file's length.
    // Columns count characters, so UTF-8 continuation bytes do not count.
    let mut cols = vec![1];
    let mut in_quotes = false;
    let mut chars = 0;
    for &b in raw {
        match b {
            b'"' => in_quotes = !in_quotes,
            b',' if !in_quotes => cols.push(chars + 2),
            b'\n' | b'\r' if !in_quotes => break,
            _ => {}
        }
        if b & 0xC0 != 0x80 {
            chars += 1;
        }
    }
    cols
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn columns_count_characters_and_respect_quotes() {
        assert_eq!(field_columns(b"a,bb,\"c,d\",e\nx,y"), vec![1, 3, 6, 12]);
        assert_eq!(field_columns("é,ü,x".as_bytes()), vec![1, 3, 5]);
    }

    #[test]
    fn fields_carry_line_and_column() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("c.csv");
        std::fs::write(&p, "file,time\n# a comment\nx.tif,2026-01-01T00:00:00Z\n").unwrap();
        let mut f = Findings::new();
        let t = read_csv(&p, &mut f).unwrap();
        assert_eq!(t.header, vec!["file", "time"]);
        assert_eq!(
            t.rows[0].field(1).unwrap(),
            ("2026-01-01T00:00:00Z", Mark::new(3, 7))
        );
    }
}
