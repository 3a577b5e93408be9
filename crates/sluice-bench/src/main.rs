//! The yardstick for `sluice link`: the bare cost of reading the same CSV bytes with polars and
//! writing them as Parquet, with nothing else done (every column read as text, no validation).
//!
//! `sluice-yardstick OUT_DIR FILE...` converts each file to `OUT_DIR/<name>.parquet` and prints
//! the rows and seconds. The benchmark script times it as a whole process beside `link`.

use anyhow::{Context, Result};
use polars::prelude::*;
use std::path::PathBuf;

fn main() -> Result<()> {
    let mut args = std::env::args_os().skip(1);
    let out = PathBuf::from(
        args.next()
            .context("usage: sluice-yardstick OUT_DIR FILE...")?,
    );
    std::fs::create_dir_all(&out)?;
    let started = std::time::Instant::now();
    let mut rows = 0;
    for f in args {
        let path = PathBuf::from(f);
        let mut df = CsvReadOptions::default()
            .with_has_header(true)
            .with_infer_schema_length(Some(0))
            .try_into_reader_with_file_path(Some(path.clone()))?
            .finish()
            .map_err(|e| anyhow::anyhow!("reading {}: {e}", path.display()))?;
        rows += df.height();
        let name = path
            .file_name()
            .context("file name")?
            .to_string_lossy()
            .to_string();
        let file = std::fs::File::create(out.join(format!("{name}.parquet")))?;
        ParquetWriter::new(file)
            .with_compression(ParquetCompression::Zstd(None))
            .finish(&mut df)?;
    }
    println!("{rows} rows in {:.2}s", started.elapsed().as_secs_f64());
    Ok(())
}
