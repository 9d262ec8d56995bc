//! Output tables. Every stage's table is written as Parquet (for programs)
//! and CSV (for people) through this module, atomically (temp file, then
//! rename) so that an interrupted run never leaves half a table behind.
//! polars stays behind this module.

use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};

use polars::prelude::{Column, CsvWriter, DataFrame, ParquetWriter, PolarsError, SerWriter};

/// Why a table or file could not be written; each names the path.
#[derive(Debug, thiserror::Error)]
pub enum TableError {
    #[error("cannot create the output folder `{}`", .path.display())]
    Folder {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("cannot create `{}`", .path.display())]
    Create {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("cannot write `{}`", .path.display())]
    Write {
        path: PathBuf,
        #[source]
        source: Box<dyn std::error::Error + Send + Sync>,
    },
    #[error("cannot move `{}` into place", .path.display())]
    Rename {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// Columns that do not make a table (a bug, not the data).
    #[error("cannot build a table")]
    Frame(#[from] PolarsError),
}

type Result<T> = std::result::Result<T, TableError>;

/// What a [`write_atomic`] filler may fail with.
pub(crate) type FillError = Box<dyn std::error::Error + Send + Sync>;

/// Rows buffered by a [`TableStream`] before they go to disk as one batch.
const STREAM_BATCH_ROWS: usize = 50_000;

/// A column-oriented table under construction.
///
/// Conventions (DEVELOPERS.md, "Table formats"): a missing number is null
/// in Parquet and an empty cell in CSV, never `NaN`; a time is a Parquet
/// timestamp in UTC and, in CSV, ISO 8601 with the offset it was recorded
/// with.
#[derive(Default)]
pub struct Table {
    columns: Vec<Column>,
    /// Columns whose CSV form differs from the Parquet one (times), by index.
    csv_forms: Vec<(usize, Column)>,
    height: Option<usize>,
}

impl Table {
    pub fn new() -> Self {
        Self::default()
    }

    fn push(&mut self, col: Column) -> &mut Self {
        let n = col.len();
        if let Some(h) = self.height {
            assert_eq!(h, n, "column `{}` has {n} rows, the table {h}", col.name());
        }
        self.height = Some(n);
        self.columns.push(col);
        self
    }

    pub fn text<S: AsRef<str>>(
        &mut self,
        name: &str,
        values: impl IntoIterator<Item = S>,
    ) -> &mut Self {
        let v: Vec<String> = values.into_iter().map(|s| s.as_ref().to_string()).collect();
        self.push(Column::new(name.into(), v))
    }

    pub fn opt_text(
        &mut self,
        name: &str,
        values: impl IntoIterator<Item = Option<String>>,
    ) -> &mut Self {
        let v: Vec<Option<String>> = values.into_iter().collect();
        self.push(Column::new(name.into(), v))
    }

    /// A number column; NaN is written as a missing value.
    pub fn real(&mut self, name: &str, values: impl IntoIterator<Item = f64>) -> &mut Self {
        self.opt_real(name, values.into_iter().map(Some))
    }

    pub fn opt_real(
        &mut self,
        name: &str,
        values: impl IntoIterator<Item = Option<f64>>,
    ) -> &mut Self {
        let v: Vec<Option<f64>> = values
            .into_iter()
            .map(|x| x.filter(|x| !x.is_nan()))
            .collect();
        self.push(Column::new(name.into(), v))
    }

    pub fn int(&mut self, name: &str, values: impl IntoIterator<Item = i64>) -> &mut Self {
        let v: Vec<i64> = values.into_iter().collect();
        self.push(Column::new(name.into(), v))
    }

    pub fn opt_int(
        &mut self,
        name: &str,
        values: impl IntoIterator<Item = Option<i64>>,
    ) -> &mut Self {
        let v: Vec<Option<i64>> = values.into_iter().collect();
        self.push(Column::new(name.into(), v))
    }

    /// A time column: a timestamp (ms, UTC) in Parquet, ISO 8601 with the
    /// value's own offset in CSV.
    pub fn time(
        &mut self,
        name: &str,
        values: impl IntoIterator<Item = chrono::DateTime<chrono::FixedOffset>>,
    ) -> &mut Self {
        use polars::prelude::{Int64Chunked, IntoColumn, TimeUnit, TimeZone};
        let v: Vec<chrono::DateTime<chrono::FixedOffset>> = values.into_iter().collect();
        let text: Vec<String> = v.iter().map(|t| t.to_rfc3339()).collect();
        let ms = Int64Chunked::from_vec(
            name.into(),
            v.iter().map(|t| t.timestamp_millis()).collect(),
        )
        .into_datetime(TimeUnit::Milliseconds, Some(TimeZone::UTC));
        self.csv_forms
            .push((self.columns.len(), Column::new(name.into(), text)));
        self.push(ms.into_column())
    }

    pub fn height(&self) -> usize {
        self.height.unwrap_or(0)
    }

    fn frame(&self) -> Result<DataFrame> {
        Ok(DataFrame::new(self.height(), self.columns.clone())?)
    }

    /// The frame as CSV writes it: time columns as text with their offsets.
    fn csv_frame(&self) -> Result<DataFrame> {
        let mut columns = self.columns.clone();
        for (i, c) in &self.csv_forms {
            columns[*i] = c.clone();
        }
        Ok(DataFrame::new(self.height(), columns)?)
    }

    /// Writes `dir/stem.parquet` and `dir/stem.csv`; returns both paths.
    pub fn write(&self, dir: &Path, stem: &str) -> Result<Vec<PathBuf>> {
        create_folder(dir)?;
        let mut df = self.frame()?;
        let pq = dir.join(format!("{stem}.parquet"));
        write_atomic(&pq, |f| {
            ParquetWriter::new(f).finish(&mut df)?;
            Ok(())
        })?;
        let csv = dir.join(format!("{stem}.csv"));
        let mut df = self.csv_frame()?;
        write_atomic(&csv, |f| {
            CsvWriter::new(f).include_header(true).finish(&mut df)?;
            Ok(())
        })?;
        Ok(vec![pq, csv])
    }
}

/// Why a Parquet file could not be read as cells.
#[derive(Debug)]
pub(crate) enum CellsError {
    /// Not Parquet, or damaged.
    Unreadable(String),
    /// A column of a type that has no plain text form (lists, structs, …).
    Column {
        index: usize,
        name: String,
        dtype: String,
    },
}

/// Reads a Parquet file as text cells, column by column, as a CSV export
/// would show them: numbers in their shortest exact form (parsing a cell
/// gives back the stored value), booleans as `true`/`false`, nulls empty.
/// Returns the column names and the columns.
pub(crate) fn read_parquet_cells(
    path: &Path,
) -> std::result::Result<(Vec<String>, Vec<Vec<String>>), CellsError> {
    use polars::prelude::{DataType, ParquetReader, SerReader};
    let file = fs::File::open(path).map_err(|e| CellsError::Unreadable(e.to_string()))?;
    let df = ParquetReader::new(file)
        .finish()
        .map_err(|e| CellsError::Unreadable(e.to_string()))?;
    let names: Vec<String> = df
        .get_column_names()
        .iter()
        .map(|n| n.to_string())
        .collect();
    let mut cells = Vec::with_capacity(names.len());
    for (index, col) in df.columns().iter().enumerate() {
        let s = col.as_materialized_series();
        let text: Option<Vec<String>> = match s.dtype() {
            DataType::String => s
                .str()
                .ok()
                .map(|c| c.iter().map(|v| v.unwrap_or("").to_string()).collect()),
            DataType::Boolean => s.bool().ok().map(|c| {
                c.iter()
                    .map(|v| v.map(|b| b.to_string()).unwrap_or_default())
                    .collect()
            }),
            DataType::Float32 | DataType::Float64 => {
                s.cast(&DataType::Float64).ok().and_then(|f| {
                    f.f64().ok().map(|c| {
                        c.iter()
                            .map(|v| v.map(|x| x.to_string()).unwrap_or_default())
                            .collect()
                    })
                })
            }
            DataType::Datetime(..) => s.cast(&DataType::String).ok().and_then(|f| {
                f.str()
                    .ok()
                    .map(|c| c.iter().map(|v| v.unwrap_or("").to_string()).collect())
            }),
            d if d.is_integer() => s.cast(&DataType::Int64).ok().and_then(|f| {
                f.i64().ok().map(|c| {
                    c.iter()
                        .map(|v| v.map(|x| x.to_string()).unwrap_or_default())
                        .collect()
                })
            }),
            _ => None,
        };
        cells.push(text.ok_or_else(|| CellsError::Column {
            index,
            name: names[index].clone(),
            dtype: s.dtype().to_string(),
        })?);
    }
    Ok((names, cells))
}

/// A table written in pieces, for tables too large to hold in memory:
/// rows arrive as small [`Table`]s with the same columns, are buffered up
/// to a fixed number of rows and written as one Parquet row group and one
/// CSV chunk. Both files appear (by rename) only when [`finish`] succeeds.
///
/// [`finish`]: TableStream::finish
pub(crate) struct TableStream {
    dir: PathBuf,
    stem: String,
    buffer: Vec<Table>,
    buffered: usize,
    writers: Option<StreamWriters>,
}

struct StreamWriters {
    parquet: polars::io::parquet::write::BatchedWriter<fs::File>,
    csv: polars::io::csv::write::BatchedWriter<std::io::BufWriter<fs::File>>,
    files: [(PathBuf, fs::File); 2],
}

impl TableStream {
    pub fn new(dir: &Path, stem: &str) -> Self {
        TableStream {
            dir: dir.to_path_buf(),
            stem: stem.to_string(),
            buffer: vec![],
            buffered: 0,
            writers: None,
        }
    }

    /// A failed write of the stream, named by the table it makes.
    fn write_error(&self, e: impl Into<FillError>) -> TableError {
        TableError::Write {
            path: self.dir.join(format!("{}.parquet", self.stem)),
            source: e.into(),
        }
    }

    fn tmp(&self, ext: &str) -> PathBuf {
        self.dir
            .join(format!(".{}.{ext}.{}.tmp", self.stem, std::process::id()))
    }

    pub fn push(&mut self, t: Table) -> Result<()> {
        // Streams write one frame to both files; a time column's CSV form
        // (`Table::time`) is only honoured by `Table::write`.
        debug_assert!(t.csv_forms.is_empty(), "time columns in a streamed table");
        self.buffered += t.height();
        self.buffer.push(t);
        if self.buffered >= STREAM_BATCH_ROWS {
            self.flush()?;
        }
        Ok(())
    }

    fn flush(&mut self) -> Result<()> {
        if self.buffer.is_empty() {
            return Ok(());
        }
        let mut df = self.buffer[0].frame()?;
        for t in &self.buffer[1..] {
            df.vstack_mut(&t.frame()?)?;
        }
        df.rechunk_mut();
        self.buffer.clear();
        self.buffered = 0;
        if self.writers.is_none() {
            create_folder(&self.dir)?;
            let (pq, csv) = (self.tmp("parquet"), self.tmp("csv"));
            let create = |p: &PathBuf| {
                fs::File::create(p).map_err(|source| TableError::Create {
                    path: p.clone(),
                    source,
                })
            };
            let (fp, fc) = (create(&pq)?, create(&csv)?);
            let schema = df.schema().as_ref().clone();
            let clone = |f: &fs::File, p: &PathBuf| {
                f.try_clone().map_err(|source| TableError::Create {
                    path: p.clone(),
                    source,
                })
            };
            let parquet = ParquetWriter::new(clone(&fp, &pq)?)
                .batched(&schema)
                .map_err(|e| self.write_error(e))?;
            let csv_writer = CsvWriter::new(std::io::BufWriter::new(clone(&fc, &csv)?))
                .include_header(true)
                .batched(&schema)
                .map_err(|e| self.write_error(e))?;
            self.writers = Some(StreamWriters {
                parquet,
                csv: csv_writer,
                files: [(pq, fp), (csv, fc)],
            });
        }
        let path = self.dir.join(format!("{}.parquet", self.stem));
        let err = |e: PolarsError| TableError::Write {
            path: path.clone(),
            source: e.into(),
        };
        let w = self.writers.as_mut().expect("created above");
        w.parquet.write_batch(&df).map_err(err)?;
        w.csv.write_batch(&df).map_err(err)?;
        Ok(())
    }

    /// Writes what is buffered, closes both files and moves them into place.
    /// An empty stream writes the `empty` table instead (so the columns exist).
    pub fn finish(mut self, empty: Table) -> Result<Vec<PathBuf>> {
        if self.writers.is_none() && self.buffer.is_empty() {
            return empty.write(&self.dir, &self.stem);
        }
        self.flush()?;
        let w = self.writers.take().expect("flushed at least once");
        w.parquet.finish().map_err(|e| self.write_error(e))?;
        let mut csv = w.csv;
        csv.finish().map_err(|e| self.write_error(e))?;
        drop(csv);
        drop(w.parquet);
        let mut out = Vec::new();
        for ((tmp, f), ext) in w.files.into_iter().zip(["parquet", "csv"]) {
            let path = self.dir.join(format!("{}.{ext}", self.stem));
            f.sync_all().map_err(|e| TableError::Write {
                path: path.clone(),
                source: e.into(),
            })?;
            fs::rename(&tmp, &path).map_err(|source| TableError::Rename {
                path: path.clone(),
                source,
            })?;
            out.push(path);
        }
        Ok(out)
    }
}

impl Drop for TableStream {
    fn drop(&mut self) {
        // An unfinished stream leaves no temporary files behind.
        if let Some(w) = self.writers.take() {
            for (tmp, _) in &w.files {
                let _ = fs::remove_file(tmp);
            }
        }
    }
}

/// Writes through a temporary file in the same folder, then renames it into place.
pub(crate) fn write_atomic(
    path: &Path,
    fill: impl FnOnce(&mut fs::File) -> std::result::Result<(), FillError>,
) -> Result<()> {
    let dir = path.parent().unwrap_or(Path::new("."));
    fs::create_dir_all(dir).map_err(|source| TableError::Create {
        path: dir.to_path_buf(),
        source,
    })?;
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().to_string())
        .unwrap_or_default();
    // Unique per write: two threads may write the same path at once (equal
    // cache entries from identical inputs); each renames its own complete file.
    static SERIAL: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(0);
    let serial = SERIAL.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    let tmp = dir.join(format!(
        ".{name}.{}-{serial}-{}.tmp",
        std::process::id(),
        host_tag()
    ));
    let result = (|| -> std::result::Result<(), FillError> {
        let mut f = fs::File::create(&tmp).map_err(|source| TableError::Create {
            path: tmp.clone(),
            source,
        })?;
        fill(&mut f)?;
        f.flush()?;
        f.sync_all()?;
        Ok(())
    })();
    if let Err(source) = result {
        let _ = fs::remove_file(&tmp);
        return Err(TableError::Write {
            path: path.to_path_buf(),
            source,
        });
    }
    fs::rename(&tmp, path).map_err(|source| TableError::Rename {
        path: path.to_path_buf(),
        source,
    })?;
    Ok(())
}

/// Creates a folder and its parents; the error names it.
pub fn create_folder(dir: &Path) -> Result<()> {
    fs::create_dir_all(dir).map_err(|source| TableError::Folder {
        path: dir.to_path_buf(),
        source,
    })
}

/// This machine's name as 8 hex digits, in temporary file names: processes
/// on different machines writing one shared folder (shards of a run on a
/// cluster) may have the same process id, and must not share a temporary.
fn host_tag() -> &'static str {
    static TAG: std::sync::OnceLock<String> = std::sync::OnceLock::new();
    TAG.get_or_init(|| {
        let name = fs::read_to_string("/proc/sys/kernel/hostname")
            .ok()
            .or_else(|| std::env::var("HOSTNAME").ok())
            .or_else(|| std::env::var("COMPUTERNAME").ok())
            .unwrap_or_default();
        // FNV-1a: short, stable, no dependency.
        let h = name.trim().bytes().fold(0xcbf2_9ce4_8422_2325u64, |h, b| {
            (h ^ b as u64).wrapping_mul(0x0100_0000_01b3)
        });
        format!("{:08x}", h as u32)
    })
}

/// Removes the temporary files an interrupted run left under `dir` (those
/// this module names `.<name>.<pid>-<n>-<host>.tmp`), and returns how many. A
/// file is left alone while the process that wrote it runs on this machine,
/// and for a minute after it was last written: another run may share the
/// folder (on a shared file system, from another machine, where a process
/// id says nothing).
pub fn remove_orphaned_temporaries(dir: &Path) -> usize {
    let Ok(entries) = fs::read_dir(dir) else {
        return 0;
    };
    let mut removed = 0;
    for e in entries.flatten() {
        let path = e.path();
        let Ok(kind) = e.file_type() else { continue };
        if kind.is_dir() {
            removed += remove_orphaned_temporaries(&path);
            continue;
        }
        let name = e.file_name().to_string_lossy().to_string();
        let Some(stem) = name.strip_suffix(".tmp").filter(|_| name.starts_with('.')) else {
            continue;
        };
        let Some((pid, host)) = stem.rsplit('.').next().and_then(|last| {
            let mut parts = last.split('-');
            let pid = parts.next()?.parse::<u32>().ok()?;
            Some((pid, parts.nth(1)))
        }) else {
            continue;
        };
        // A process id is only known to be alive on the machine that wrote it.
        let here = host.is_none_or(|h| h == host_tag());
        let alive =
            here && (pid == std::process::id() || Path::new(&format!("/proc/{pid}")).exists());
        let recent = e
            .metadata()
            .and_then(|m| m.modified())
            .ok()
            .and_then(|t| t.elapsed().ok())
            .is_none_or(|age| age.as_secs() < 60);
        if !alive && !recent && fs::remove_file(&path).is_ok() {
            removed += 1;
        }
    }
    removed
}

/// Writes bytes atomically.
pub(crate) fn write_bytes_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    write_atomic(path, |f| {
        f.write_all(bytes)?;
        Ok(())
    })
}

#[cfg(test)]
// Values here are exact by construction (sums of binary fractions, integers).
#[allow(clippy::float_cmp)]
mod tests {
    use super::*;

    #[test]
    fn only_orphaned_temporaries_are_removed() {
        let dir = tempfile::tempdir().unwrap();
        let sub = dir.path().join("cache/items");
        fs::create_dir_all(&sub).unwrap();
        let old = std::time::SystemTime::now() - std::time::Duration::from_secs(3600);
        let touch = |name: &str, when: std::time::SystemTime| {
            let p = sub.join(name);
            fs::write(&p, b"x").unwrap();
            fs::File::options()
                .write(true)
                .open(&p)
                .unwrap()
                .set_modified(when)
                .unwrap();
            p
        };
        // No process has a pid above Linux's largest (2^22).
        let orphan = touch(".a.bin.4294967-3.tmp", old);
        let stream = touch(".so2.csv.4294967.tmp", old);
        let pid = std::process::id();
        let mine = touch(&format!(".b.bin.{pid}-0-{}.tmp", host_tag()), old);
        // The same process id on another machine of a shared folder says
        // nothing about this machine's processes.
        let far = if host_tag() == "00000000" {
            "00000001"
        } else {
            "00000000"
        };
        let elsewhere = touch(&format!(".d.bin.{pid}-0-{far}.tmp",), old);
        let elsewhere_fresh = touch(
            &format!(".e.bin.{pid}-1-{far}.tmp"),
            std::time::SystemTime::now(),
        );
        let fresh = touch(".c.bin.4294967-4.tmp", std::time::SystemTime::now());
        let other = touch("notes.tmp", old);
        assert_eq!(remove_orphaned_temporaries(dir.path()), 3);
        assert!(!orphan.exists() && !stream.exists() && !elsewhere.exists());
        assert!(mine.exists() && fresh.exists() && other.exists() && elsewhere_fresh.exists());
    }

    #[test]
    fn parquet_cells_give_back_the_stored_values() {
        let dir = tempfile::tempdir().unwrap();
        let mut t = Table::new();
        t.text("name", ["a", "b"])
            .int("n", [3, -1])
            .real("x", [0.1 + 0.2, 1e-300])
            .opt_real("y", [Some(2.5), None]);
        t.write(dir.path(), "t").unwrap();
        let (names, cells) = read_parquet_cells(&dir.path().join("t.parquet")).unwrap();
        assert_eq!(names, ["name", "n", "x", "y"]);
        assert_eq!(cells[0], ["a", "b"]);
        assert_eq!(cells[1], ["3", "-1"]);
        assert_eq!(cells[2][0].parse::<f64>().unwrap(), 0.1 + 0.2);
        assert_eq!(cells[2][1].parse::<f64>().unwrap(), 1e-300);
        assert_eq!(cells[3], ["2.5", ""]);
        assert!(matches!(
            read_parquet_cells(&dir.path().join("t.csv")),
            Err(CellsError::Unreadable(_))
        ));
    }

    #[test]
    fn writes_csv_and_parquet_that_read_back() {
        let dir = tempfile::tempdir().unwrap();
        let mut t = Table::new();
        t.text("capture", ["a.tif", "b.tif"])
            .opt_real("spo2", [Some(97.5), None])
            .int("n", [3, 0]);
        let paths = t.write(dir.path(), "captures").unwrap();
        assert_eq!(paths.len(), 2);
        let csv = fs::read_to_string(dir.path().join("captures.csv")).unwrap();
        assert_eq!(csv, "capture,spo2,n\na.tif,97.5,3\nb.tif,,0\n");
        let f = fs::File::open(dir.path().join("captures.parquet")).unwrap();
        use polars::prelude::SerReader;
        let df = polars::prelude::ParquetReader::new(f).finish().unwrap();
        assert_eq!(df.shape(), (2, 3));
        assert!(
            !dir.path().read_dir().unwrap().any(|e| e
                .unwrap()
                .file_name()
                .to_string_lossy()
                .ends_with(".tmp"))
        );
    }

    #[test]
    fn a_streamed_table_equals_the_table_written_at_once() {
        let dir = tempfile::tempdir().unwrap();
        let piece = |k: i64| {
            let mut t = Table::new();
            t.text("capture", [format!("c{k}"), format!("c{k}")])
                .opt_real("t", [Some(k as f64 / 3.0), None])
                .int("n", [k, -k]);
            t
        };
        let mut s = TableStream::new(dir.path(), "streamed");
        for k in 0..5 {
            s.push(piece(k)).unwrap();
        }
        s.finish(Table::new()).unwrap();
        let mut whole = Table::new();
        whole
            .text(
                "capture",
                (0..5).flat_map(|k| [format!("c{k}"), format!("c{k}")]),
            )
            .opt_real("t", (0..5).flat_map(|k| [Some(k as f64 / 3.0), None]))
            .int("n", (0..5).flat_map(|k| [k, -k]));
        whole.write(dir.path(), "whole").unwrap();
        assert_eq!(
            fs::read(dir.path().join("streamed.csv")).unwrap(),
            fs::read(dir.path().join("whole.csv")).unwrap()
        );
        use polars::prelude::SerReader;
        let read = |n: &str| {
            polars::prelude::ParquetReader::new(fs::File::open(dir.path().join(n)).unwrap())
                .finish()
                .unwrap()
        };
        assert!(read("streamed.parquet").equals_missing(&read("whole.parquet")));
        assert!(
            !dir.path().read_dir().unwrap().any(|e| e
                .unwrap()
                .file_name()
                .to_string_lossy()
                .ends_with(".tmp"))
        );
    }
}
