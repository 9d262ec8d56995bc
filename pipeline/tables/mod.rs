//! Output tables. Every stage's table is written as Parquet (for programs)
//! and CSV (for people) through this module, atomically (temp file, then
//! rename) so that an interrupted run never leaves half a table behind.
//! polars stays behind this module.

use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use polars::prelude::{Column, CsvWriter, DataFrame, ParquetWriter, SerWriter};

/// A column-oriented table under construction.
#[derive(Default)]
pub struct Table {
    columns: Vec<Column>,
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

    pub fn text<S: AsRef<str>>(&mut self, name: &str, values: impl IntoIterator<Item = S>) -> &mut Self {
        let v: Vec<String> = values.into_iter().map(|s| s.as_ref().to_string()).collect();
        self.push(Column::new(name.into(), v))
    }

    pub fn opt_text(&mut self, name: &str, values: impl IntoIterator<Item = Option<String>>) -> &mut Self {
        let v: Vec<Option<String>> = values.into_iter().collect();
        self.push(Column::new(name.into(), v))
    }

    pub fn real(&mut self, name: &str, values: impl IntoIterator<Item = f64>) -> &mut Self {
        let v: Vec<f64> = values.into_iter().collect();
        self.push(Column::new(name.into(), v))
    }

    pub fn opt_real(&mut self, name: &str, values: impl IntoIterator<Item = Option<f64>>) -> &mut Self {
        let v: Vec<Option<f64>> = values.into_iter().collect();
        self.push(Column::new(name.into(), v))
    }

    pub fn int(&mut self, name: &str, values: impl IntoIterator<Item = i64>) -> &mut Self {
        let v: Vec<i64> = values.into_iter().collect();
        self.push(Column::new(name.into(), v))
    }

    pub fn height(&self) -> usize {
        self.height.unwrap_or(0)
    }

    fn frame(&self) -> Result<DataFrame> {
        Ok(DataFrame::new(self.height(), self.columns.clone())?)
    }

    /// Writes `dir/stem.parquet` and `dir/stem.csv`; returns both paths.
    pub fn write(&self, dir: &Path, stem: &str) -> Result<Vec<PathBuf>> {
        fs::create_dir_all(dir).with_context(|| format!("cannot create the output folder `{}`", dir.display()))?;
        let mut df = self.frame()?;
        let pq = dir.join(format!("{stem}.parquet"));
        write_atomic(&pq, |f| {
            ParquetWriter::new(f).finish(&mut df)?;
            Ok(())
        })?;
        let csv = dir.join(format!("{stem}.csv"));
        write_atomic(&csv, |f| {
            CsvWriter::new(f).include_header(true).finish(&mut df)?;
            Ok(())
        })?;
        Ok(vec![pq, csv])
    }
}

/// Writes through a temporary file in the same folder, then renames it into place.
pub fn write_atomic(path: &Path, fill: impl FnOnce(&mut fs::File) -> Result<()>) -> Result<()> {
    let dir = path.parent().unwrap_or(Path::new("."));
    fs::create_dir_all(dir).with_context(|| format!("cannot create `{}`", dir.display()))?;
    let name = path.file_name().map(|n| n.to_string_lossy().to_string()).unwrap_or_default();
    let tmp = dir.join(format!(".{name}.{}.tmp", std::process::id()));
    let result = (|| -> Result<()> {
        let mut f = fs::File::create(&tmp).with_context(|| format!("cannot create `{}`", tmp.display()))?;
        fill(&mut f)?;
        f.flush()?;
        f.sync_all()?;
        Ok(())
    })();
    if let Err(e) = result {
        let _ = fs::remove_file(&tmp);
        return Err(e.context(format!("cannot write `{}`", path.display())));
    }
    fs::rename(&tmp, path).with_context(|| format!("cannot move `{}` into place", path.display()))?;
    Ok(())
}

/// Writes bytes atomically.
pub fn write_bytes_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    write_atomic(path, |f| {
        f.write_all(bytes)?;
        Ok(())
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn writes_csv_and_parquet_that_read_back() {
        let dir = tempfile::tempdir().unwrap();
        let mut t = Table::new();
        t.text("capture", ["a.tif", "b.tif"]).opt_real("spo2", [Some(97.5), None]).int("n", [3, 0]);
        let paths = t.write(dir.path(), "captures").unwrap();
        assert_eq!(paths.len(), 2);
        let csv = fs::read_to_string(dir.path().join("captures.csv")).unwrap();
        assert_eq!(csv, "capture,spo2,n\na.tif,97.5,3\nb.tif,,0\n");
        let f = fs::File::open(dir.path().join("captures.parquet")).unwrap();
        use polars::prelude::SerReader;
        let df = polars::prelude::ParquetReader::new(f).finish().unwrap();
        assert_eq!(df.shape(), (2, 3));
        assert!(!dir.path().read_dir().unwrap().any(|e| e.unwrap().file_name().to_string_lossy().ends_with(".tmp")));
    }
}
