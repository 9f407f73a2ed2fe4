//! Load time and resident memory of a large item catalog: writes an invented catalog of `--rows`
//! items of dimension `--dim` (ids `sku-0000000`, 24 categories, float32 lists, snappy Parquet)
//! unless the file exists, then loads it with the service's loader and prints the wall time and
//! the process's resident set (VmRSS from /proc/self/status) before and after, against the
//! catalog's f32 size.
//!
//! ```text
//! cargo run --release --example catalog_load -- --rows 1000000 --dim 64 --file /tmp/items-1m.parquet
//! ```
//! Issue 16's targets: load ≤ 3 s on the 2-core machine, RSS added ≤ 1.3 × rows·dim·4 bytes.

use std::sync::Arc;
use std::time::Instant;

use arrow_array::{ArrayRef, FixedSizeListArray, Float32Array, RecordBatch, StringArray};
use medley::serve::catalog::Catalog;

fn arg(name: &str) -> Option<String> {
    let args: Vec<String> = std::env::args().collect();
    args.iter().position(|a| a == name).and_then(|i| args.get(i + 1).cloned())
}

/// Resident set size in bytes (Linux).
fn rss() -> u64 {
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    status
        .lines()
        .find_map(|l| l.strip_prefix("VmRSS:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse::<u64>().ok())
        .map_or(0, |kb| kb * 1024)
}

fn write(path: &std::path::Path, rows: usize, dim: usize) {
    let mut state = 0x00C0_FFEE_u64;
    let mut next = move || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        (state >> 40) as f32 / (1u64 << 24) as f32 - 0.5
    };
    let file = std::fs::File::create(path).expect("creating the catalog");
    let props = parquet::file::properties::WriterProperties::builder()
        .set_compression(parquet::basic::Compression::SNAPPY)
        .build();
    let mut writer = None;
    let chunk = 100_000;
    for start in (0..rows).step_by(chunk) {
        let n = chunk.min(rows - start);
        let values: Float32Array = (0..n * dim).map(|_| next()).collect();
        let item = Arc::new(arrow_schema::Field::new("item", arrow_schema::DataType::Float32, false));
        let embedding = FixedSizeListArray::try_new(item, dim as i32, Arc::new(values), None).unwrap();
        let ids = StringArray::from_iter_values((start..start + n).map(|i| format!("sku-{i:07}")));
        let cats = StringArray::from_iter_values((start..start + n).map(|i| format!("cat-{}", i % 24)));
        let columns: Vec<(&str, ArrayRef)> =
            vec![("id", Arc::new(ids)), ("embedding", Arc::new(embedding)), ("category", Arc::new(cats))];
        let batch = RecordBatch::try_from_iter(columns).unwrap();
        let w = writer.get_or_insert_with(|| {
            parquet::arrow::ArrowWriter::try_new(
                file.try_clone().unwrap(),
                batch.schema(),
                Some(props.clone()),
            )
            .unwrap()
        });
        w.write(&batch).unwrap();
    }
    writer.expect("at least one row").close().unwrap();
}

fn main() {
    let rows: usize = arg("--rows").map_or(1_000_000, |v| v.parse().expect("--rows N"));
    let dim: usize = arg("--dim").map_or(64, |v| v.parse().expect("--dim D"));
    let path = std::path::PathBuf::from(
        arg("--file").unwrap_or_else(|| format!("/tmp/medley-catalog-{rows}x{dim}.parquet")),
    );
    if !path.exists() {
        let t = Instant::now();
        write(&path, rows, dim);
        eprintln!("wrote {} in {:.1} s", path.display(), t.elapsed().as_secs_f64());
    }
    let size = std::fs::metadata(&path).map_or(0, |m| m.len());
    let before = rss();
    let t = Instant::now();
    let catalog = Catalog::load(&path, 65_536).expect("the catalog loads");
    let seconds = t.elapsed().as_secs_f64();
    let after = rss();
    let f32_bytes = (catalog.len() * catalog.dim() * 4) as f64;
    let mib = |b: f64| b / (1 << 20) as f64;
    println!("file            {} ({:.0} MiB)", path.display(), mib(size as f64));
    println!("items × dim     {} × {} (version {})", catalog.len(), catalog.dim(), catalog.version());
    println!("load            {seconds:.2} s");
    println!("RSS before      {:.0} MiB", mib(before as f64));
    println!("RSS after       {:.0} MiB", mib(after as f64));
    println!(
        "RSS added       {:.0} MiB = {:.2} × the f32 rows ({:.0} MiB); catalog arrays {:.0} MiB",
        mib(after.saturating_sub(before) as f64),
        after.saturating_sub(before) as f64 / f32_bytes,
        mib(f32_bytes),
        mib(catalog.heap_bytes() as f64)
    );
    let probe = catalog.get("sku-0000042").map(|i| i.embedding.len());
    assert_eq!(probe, Some(dim));
}
