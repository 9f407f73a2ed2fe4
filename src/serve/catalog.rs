//! The item catalog: embeddings and categories by item id, loaded from a Parquet or Arrow IPC file
//! so callers can send ids and scores only.
//!
//! # File
//! Columns `id` (utf8, unique, not null), `embedding` (list, large list or fixed-size list of
//! float32 or float64; one length for every row) and, optionally, `category` (utf8, nullable).
//! Other columns are not read. `.arrow`, `.feather` and `.ipc` files are Arrow IPC files (Feather
//! v2); anything else is read as Parquet.
//!
//! # Load
//! [`Catalog::load`] reads the whole file once (the bytes are hashed for the version), decodes only
//! the three columns in batches of 64 Ki rows, and checks every row with the rules of a request's
//! embedding: finite values (a float64 that overflows f32 is not finite), a non-zero norm, one
//! dimension in `1..=max_dim`; and unique, non-null ids. The first bad row refuses the whole file
//! with an error naming the row (0-based, in file order) and the column. Rows are L2-normalised
//! with [`medley_core::model::push_unit`], the request path's own normalisation, and stored
//! contiguously as f32; that normalisation is idempotent, so a request that takes its embeddings
//! from the catalog is served exactly as if it had sent the same embeddings inline.
//!
//! # Memory
//! For N rows of dimension d with ids of mean length L bytes: `4·N·d` bytes of rows, `L·N` of id
//! text, `4·N` of id offsets, `4·N` of category codes, and an index of `u32` row numbers (hashbrown's
//! `HashTable`, ≤ 8/7 slots per row plus a control byte each: about `9·N` bytes at its worst load).
//! At 1,000,000 × 64 with 11-byte ids that is 256 MB of rows plus about 30 MB.
//!
//! # Version
//! `"{rows}-{digest}"`, the digest being FNV-1a 64 of the file's bytes as 16 hex digits: two
//! replicas that loaded the same file report the same version.

use std::collections::HashMap;
use std::hash::BuildHasher as _;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::cast::AsArray as _;
use arrow_array::types::{Float32Type, Float64Type, Int32Type};
use arrow_array::{Array, ArrayRef, RecordBatch};
use arrow_schema::{DataType, SchemaRef};
use medley_core::model::{push_unit, RowFault};

/// Rows decoded per Arrow batch while loading.
const BATCH_ROWS: usize = 8 * 1024;

/// Code of a row without a category.
const NO_CATEGORY: u32 = u32::MAX;

/// Why a catalog file was refused. The message names the file, and the row and column at fault
/// when one is.
#[derive(Debug, thiserror::Error)]
pub enum CatalogError {
    /// The file cannot be read.
    #[error("catalog {path}: {error}")]
    Io {
        /// The file.
        path: String,
        /// The I/O error.
        error: std::io::Error,
    },
    /// Not a Parquet (or Arrow IPC) file, or a corrupt one.
    #[error("catalog {path}: not a readable {format} file: {message}")]
    Format {
        /// The file.
        path: String,
        /// `Parquet` or `Arrow IPC`, chosen by the extension.
        format: &'static str,
        /// The reader's description.
        message: String,
    },
    /// A required column is absent, or a column has a type the catalog cannot use.
    #[error("catalog {path}: column {column}: {message}")]
    Column {
        /// The file.
        path: String,
        /// The column.
        column: &'static str,
        /// What is wrong.
        message: String,
    },
    /// One row breaks a rule.
    #[error("catalog {path}: row {row}, column {column}: {message}")]
    Row {
        /// The file.
        path: String,
        /// 0-based row in file order.
        row: usize,
        /// The column.
        column: &'static str,
        /// What is wrong.
        message: String,
    },
}

/// What identifies the file a catalog was loaded from without reading it: a reload that finds the
/// same stamp keeps the loaded catalog.
#[derive(Debug, Clone, PartialEq, Eq)]
struct Stamp {
    len: u64,
    modified: Option<std::time::SystemTime>,
    #[cfg(unix)]
    inode: (u64, u64),
}

impl Stamp {
    fn of(path: &Path) -> std::io::Result<Self> {
        let m = std::fs::metadata(path)?;
        #[cfg(unix)]
        let inode = {
            use std::os::unix::fs::MetadataExt as _;
            (m.dev(), m.ino())
        };
        Ok(Self {
            len: m.len(),
            modified: m.modified().ok(),
            #[cfg(unix)]
            inode,
        })
    }
}

/// One catalog row as a request sees it.
#[derive(Debug, Clone, Copy)]
pub struct CatalogItem<'a> {
    /// The unit-norm embedding (f32, normalised at load).
    pub embedding: &'a [f32],
    /// The category, when the file has one for this row.
    pub category: Option<&'a str>,
}

/// A loaded, validated catalog. Immutable; a reload builds a new one and swaps it in whole with
/// the engine, so one request is served by one catalog.
///
/// # Invariants
/// `ids` holds every id back to back, id `r` being `ids[end(r-1)..end(r)]`; ids are unique and
/// `index` maps each id's hash to its row; `rows.len() = len·dim` and every row has unit norm up
/// to f32 rounding; `category[r]` is `NO_CATEGORY` (`u32::MAX`) or an index into `category_names`.
pub struct Catalog {
    path: PathBuf,
    stamp: Option<Stamp>,
    version: String,
    dim: usize,
    ids: String,
    id_end: Vec<u32>,
    index: hashbrown::HashTable<u32>,
    hasher: std::hash::RandomState,
    rows: Vec<f32>,
    category: Vec<u32>,
    category_names: Vec<Box<str>>,
}

impl std::fmt::Debug for Catalog {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Catalog")
            .field("path", &self.path)
            .field("version", &self.version)
            .field("rows", &self.len())
            .field("dim", &self.dim)
            .finish_non_exhaustive()
    }
}

/// Writes items as an item catalog in Parquet (snappy) that [`Catalog::load`] reads: `id`,
/// `embedding` (a fixed-size list of `dim` f32 values; `rows` holds them row-major) and
/// `category`. For `medley sample`, the benches and the examples.
///
/// # Errors
/// An I/O error from the file, or Arrow's or Parquet's error when the columns disagree in
/// length or `rows` is not `dim` values a row.
pub fn write_parquet<I, C>(
    path: &Path,
    ids: I,
    rows: Vec<f32>,
    dim: usize,
    categories: C,
) -> std::io::Result<()>
where
    I: IntoIterator,
    I::Item: AsRef<str>,
    C: IntoIterator,
    C::Item: AsRef<str>,
{
    use arrow_array::{ArrayRef, FixedSizeListArray, Float32Array, RecordBatch, StringArray};
    let item = Arc::new(arrow_schema::Field::new("item", arrow_schema::DataType::Float32, false));
    let dim = i32::try_from(dim).map_err(std::io::Error::other)?;
    let embedding = FixedSizeListArray::try_new(item, dim, Arc::new(Float32Array::from(rows)), None)
        .map_err(std::io::Error::other)?;
    let columns: Vec<(&str, ArrayRef)> = vec![
        ("id", Arc::new(StringArray::from_iter_values(ids))),
        ("embedding", Arc::new(embedding)),
        ("category", Arc::new(StringArray::from_iter_values(categories))),
    ];
    let batch = RecordBatch::try_from_iter(columns).map_err(std::io::Error::other)?;
    let props = parquet::file::properties::WriterProperties::builder()
        .set_compression(parquet::basic::Compression::SNAPPY)
        .build();
    let file = std::fs::File::create(path)?;
    let mut writer = parquet::arrow::ArrowWriter::try_new(file, batch.schema(), Some(props))
        .map_err(std::io::Error::other)?;
    writer.write(&batch).map_err(std::io::Error::other)?;
    writer.close().map_err(std::io::Error::other)?;
    Ok(())
}

impl Catalog {
    /// Loads and validates the catalog at `path`, with the request limit `max_dim`.
    ///
    /// # Errors
    /// A [`CatalogError`] naming the file, and the row and column at fault when one is.
    ///
    /// # Complexity
    /// O(file size + N·d) time; peak memory is the file, one decoded batch and the catalog.
    pub fn load(path: &Path, max_dim: usize) -> Result<Self, CatalogError> {
        let shown = path.display().to_string();
        let io = |error| CatalogError::Io { path: shown.clone(), error };
        let stamp = Stamp::of(path).map_err(io)?;
        let bytes = bytes::Bytes::from(std::fs::read(path).map_err(io)?);
        let mut builder = Builder::new(shown.clone(), max_dim);
        let ipc = path
            .extension()
            .and_then(std::ffi::OsStr::to_str)
            .is_some_and(|e| ["arrow", "feather", "ipc"].contains(&e.to_ascii_lowercase().as_str()));
        // The digest (a serial FNV pass over every byte) runs beside the decode.
        let (digest, read) = rayon::join(
            || crate::serve::config::fnv1a64(bytes.iter()),
            || {
                if ipc {
                    read_ipc(bytes.clone(), &mut builder)
                } else {
                    read_parquet(bytes.clone(), &mut builder)
                }
            },
        );
        read?;
        drop(bytes);
        let mut catalog = builder.finish()?;
        catalog.version = format!("{}-{digest:016x}", catalog.len());
        catalog.path = path.to_path_buf();
        catalog.stamp = Some(stamp);
        Ok(catalog)
    }

    /// Whether the file at `path` is, by its size, modification time and inode, the one this
    /// catalog was loaded from (so a reload can keep it without reading the file).
    #[must_use]
    pub fn is_current(&self, path: &Path) -> bool {
        self.path == path && self.stamp.is_some() && Stamp::of(path).ok() == self.stamp
    }

    /// The file it was loaded from.
    #[must_use]
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// `"{rows}-{FNV-1a 64 of the file, 16 hex digits}"`.
    #[must_use]
    pub fn version(&self) -> &str {
        &self.version
    }

    /// Number of items.
    #[must_use]
    pub fn len(&self) -> usize {
        self.id_end.len()
    }

    /// Whether the catalog has no items.
    #[must_use]
    pub fn is_empty(&self) -> bool {
        self.id_end.is_empty()
    }

    /// Embedding dimension.
    #[must_use]
    pub fn dim(&self) -> usize {
        self.dim
    }

    fn id(&self, row: usize) -> &str {
        let start = if row == 0 { 0 } else { self.id_end[row - 1] as usize };
        &self.ids[start..self.id_end[row] as usize]
    }

    /// The item with id `id`. O(|id|) expected.
    #[must_use]
    pub fn get(&self, id: &str) -> Option<CatalogItem<'_>> {
        let hash = self.hasher.hash_one(id);
        let &row = self.index.find(hash, |&r| self.id(r as usize) == id)?;
        let row = row as usize;
        let code = self.category[row];
        Some(CatalogItem {
            embedding: &self.rows[row * self.dim..(row + 1) * self.dim],
            category: (code != NO_CATEGORY).then(|| &*self.category_names[code as usize]),
        })
    }

    /// Bytes held by the catalog's arrays (rows, ids, index, categories), for the memory figures.
    #[must_use]
    pub fn heap_bytes(&self) -> usize {
        self.rows.capacity() * 4
            + self.ids.capacity()
            + self.id_end.capacity() * 4
            + self.index.capacity() * 5
            + self.category.capacity() * 4
            + self.category_names.iter().map(|c| c.len() + 16).sum::<usize>()
    }
}

/// Accumulates validated rows batch by batch.
struct Builder {
    path: String,
    max_dim: usize,
    dim: Option<usize>,
    ids: String,
    id_end: Vec<u32>,
    index: hashbrown::HashTable<u32>,
    hasher: std::hash::RandomState,
    rows: Vec<f32>,
    category: Vec<u32>,
    category_names: Vec<Box<str>>,
    category_code: HashMap<Box<str>, u32>,
    scratch: Vec<f32>,
}

/// The string columns the catalog accepts, read alike.
enum Strings<'a> {
    Utf8(&'a arrow_array::StringArray),
    Large(&'a arrow_array::LargeStringArray),
    View(&'a arrow_array::StringViewArray),
    Dict(&'a arrow_array::DictionaryArray<Int32Type>, Box<Strings<'a>>),
}

impl<'a> Strings<'a> {
    fn of(array: &'a ArrayRef) -> Option<Self> {
        Some(match array.data_type() {
            DataType::Utf8 => Self::Utf8(array.as_string::<i32>()),
            DataType::LargeUtf8 => Self::Large(array.as_string::<i64>()),
            DataType::Utf8View => Self::View(array.as_string_view()),
            DataType::Dictionary(key, _) if **key == DataType::Int32 => {
                let dict = array.as_dictionary::<Int32Type>();
                Self::Dict(dict, Box::new(Self::of(dict.values())?))
            }
            _ => return None,
        })
    }

    fn get(&self, i: usize) -> Option<&'a str> {
        match self {
            Self::Utf8(a) => a.is_valid(i).then(|| a.value(i)),
            Self::Large(a) => a.is_valid(i).then(|| a.value(i)),
            Self::View(a) => a.is_valid(i).then(|| a.value(i)),
            Self::Dict(a, values) => {
                let key = a.keys().is_valid(i).then(|| a.keys().value(i))?;
                values.get(usize::try_from(key).ok()?)
            }
        }
    }
}

/// One batch's embedding column: the lists, their offsets and their values.
struct Lists<'a> {
    column: &'a ArrayRef,
    values: &'a ArrayRef,
    offsets: Offsets<'a>,
    floats: Floats<'a>,
}

/// Where row `i`'s values start and end in a list column's values.
enum Offsets<'a> {
    I32(&'a [i32]),
    I64(&'a [i64]),
    /// A fixed-size list: row `i` starts at `first + i·len`.
    Fixed {
        first: usize,
        len: usize,
    },
}

/// One row's (or one batch's) embedding values, in the file's float type.
#[derive(Clone, Copy)]
enum Floats<'a> {
    F32(&'a [f32]),
    F64(&'a [f64]),
}

impl Builder {
    fn new(path: String, max_dim: usize) -> Self {
        Self {
            path,
            max_dim,
            dim: None,
            ids: String::new(),
            id_end: Vec::new(),
            index: hashbrown::HashTable::new(),
            hasher: std::hash::RandomState::new(),
            rows: Vec::new(),
            category: Vec::new(),
            category_names: Vec::new(),
            category_code: HashMap::new(),
            scratch: Vec::new(),
        }
    }

    fn reserve(&mut self, rows: usize) {
        self.id_end.reserve(rows);
        self.category.reserve(rows);
        let (hasher, ids, id_end) = (&self.hasher, &self.ids, &self.id_end);
        self.index.reserve(rows, |&r| hash_row(hasher, ids, id_end, r));
    }

    fn column_error(&self, column: &'static str, message: impl Into<String>) -> CatalogError {
        CatalogError::Column { path: self.path.clone(), column, message: message.into() }
    }

    fn row_error(&self, row: usize, column: &'static str, message: impl Into<String>) -> CatalogError {
        CatalogError::Row { path: self.path.clone(), row, column, message: message.into() }
    }

    /// Checks the file's schema before any row is read.
    fn check_schema(&self, schema: &SchemaRef) -> Result<(), CatalogError> {
        let field = |name: &'static str| schema.field_with_name(name).ok();
        let id = field("id")
            .ok_or_else(|| self.column_error("id", "missing (an utf8 column of unique item ids)"))?;
        if !is_string(id.data_type()) {
            return Err(self.column_error("id", format!("has type {}; expected utf8", id.data_type())));
        }
        let embedding = field("embedding").ok_or_else(|| {
            self.column_error("embedding", "missing (a list of float32 or float64 per item)")
        })?;
        let item = match embedding.data_type() {
            DataType::List(f) | DataType::LargeList(f) | DataType::FixedSizeList(f, _) => Some(f.data_type()),
            _ => None,
        };
        if !matches!(item, Some(DataType::Float32 | DataType::Float64)) {
            return Err(self.column_error(
                "embedding",
                format!("has type {}; expected a list of float32 or float64", embedding.data_type()),
            ));
        }
        if let Some(c) = field("category") {
            if !is_string(c.data_type()) {
                return Err(
                    self.column_error("category", format!("has type {}; expected utf8", c.data_type()))
                );
            }
        }
        Ok(())
    }

    /// Validates and appends one batch; `first` is the file row of its first row.
    fn push_batch(&mut self, batch: &RecordBatch) -> Result<(), CatalogError> {
        let first = self.id_end.len();
        let column = |name: &'static str| batch.column_by_name(name);
        let ids = column("id").and_then(Strings::of).ok_or_else(|| self.column_error("id", "unreadable"))?;
        let categories = match column("category") {
            None => None,
            Some(c) => Some(Strings::of(c).ok_or_else(|| self.column_error("category", "unreadable"))?),
        };
        let embeddings = column("embedding").ok_or_else(|| self.column_error("embedding", "unreadable"))?;
        let embeddings = self.lists(embeddings)?;
        self.reserve(batch.num_rows());
        for i in 0..batch.num_rows() {
            let row = first + i;
            let id = ids.get(i).ok_or_else(|| self.row_error(row, "id", "is null"))?;
            if id.len() > medley_core::model::MAX_LABEL_BYTES {
                return Err(self.row_error(
                    row,
                    "id",
                    format!("is {} bytes; the limit is {}", id.len(), medley_core::model::MAX_LABEL_BYTES),
                ));
            }
            let values = self.row_values(&embeddings, i, row)?;
            self.push_embedding(values, row)?;
            let category = categories.as_ref().and_then(|c| c.get(i));
            if let Some(c) = category.filter(|c| c.len() > medley_core::model::MAX_LABEL_BYTES) {
                return Err(self.row_error(
                    row,
                    "category",
                    format!("is {} bytes; the limit is {}", c.len(), medley_core::model::MAX_LABEL_BYTES),
                ));
            }
            self.push_id(id, row)?;
            let code = match category {
                None => NO_CATEGORY,
                Some(c) => match self.category_code.get(c) {
                    Some(&code) => code,
                    None => {
                        let code = u32::try_from(self.category_names.len()).unwrap_or(NO_CATEGORY - 1);
                        self.category_names.push(c.into());
                        self.category_code.insert(c.into(), code);
                        code
                    }
                },
            };
            self.category.push(code);
        }
        Ok(())
    }

    /// The embedding column of one batch, its type resolved once.
    fn lists<'a>(&self, column: &'a ArrayRef) -> Result<Lists<'a>, CatalogError> {
        let (values, offsets) = match column.data_type() {
            DataType::List(_) => {
                let list = column.as_list::<i32>();
                (list.values(), Offsets::I32(list.value_offsets()))
            }
            DataType::LargeList(_) => {
                let list = column.as_list::<i64>();
                (list.values(), Offsets::I64(list.value_offsets()))
            }
            DataType::FixedSizeList(_, _) => {
                let list = column.as_fixed_size_list();
                let first = if list.is_empty() { 0 } else { list.value_offset_at(0) };
                (list.values(), Offsets::Fixed { first, len: list.value_length() as usize })
            }
            other => return Err(self.column_error("embedding", format!("has type {other}"))),
        };
        let floats = match values.data_type() {
            DataType::Float32 => Floats::F32(values.as_primitive::<Float32Type>().values()),
            DataType::Float64 => Floats::F64(values.as_primitive::<Float64Type>().values()),
            other => return Err(self.column_error("embedding", format!("holds {other} values"))),
        };
        Ok(Lists { column, values, offsets, floats })
    }

    fn row_values<'a>(&self, lists: &Lists<'a>, i: usize, row: usize) -> Result<Floats<'a>, CatalogError> {
        if lists.column.is_null(i) {
            return Err(self.row_error(row, "embedding", "is null"));
        }
        let (start, len) = match lists.offsets {
            Offsets::I32(o) => (o[i] as usize, (o[i + 1] - o[i]) as usize),
            Offsets::I64(o) => (o[i] as usize, (o[i + 1] - o[i]) as usize),
            Offsets::Fixed { first, len } => (first + i * len, len),
        };
        if lists.values.null_count() > 0 && (start..start + len).any(|j| lists.values.is_null(j)) {
            return Err(self.row_error(row, "embedding", "holds a null value"));
        }
        Ok(match lists.floats {
            Floats::F32(v) => Floats::F32(&v[start..start + len]),
            Floats::F64(v) => Floats::F64(&v[start..start + len]),
        })
    }

    fn push_embedding(&mut self, values: Floats<'_>, row: usize) -> Result<(), CatalogError> {
        let len = match values {
            Floats::F32(v) => v.len(),
            Floats::F64(v) => v.len(),
        };
        match self.dim {
            None if len == 0 || len > self.max_dim => {
                return Err(self.row_error(
                    row,
                    "embedding",
                    format!("has dimension {len}; allowed is 1..={} (server.max_dim)", self.max_dim),
                ))
            }
            None => {
                self.dim = Some(len);
                self.rows.reserve(len * self.id_end.capacity());
            }
            Some(dim) if dim != len => {
                return Err(self.row_error(
                    row,
                    "embedding",
                    format!("has dimension {len}, but row 0 set the dimension to {dim}"),
                ))
            }
            Some(_) => {}
        }
        let fault = match values {
            Floats::F32(v) => push_unit(v, &mut self.rows),
            Floats::F64(v) => {
                // Rounded to f32 first, as a request's JSON numbers are; an f64 beyond f32's range
                // becomes infinite and is refused as non-finite.
                self.scratch.clear();
                self.scratch.extend(v.iter().map(|&x| x as f32));
                push_unit(&self.scratch, &mut self.rows)
            }
        };
        fault.map(|_stored_norm2| ()).map_err(|f| match f {
            RowFault::NonFinite => self.row_error(row, "embedding", "holds a NaN or infinite value (as f32)"),
            RowFault::ZeroNorm => {
                self.row_error(row, "embedding", "is all zeros; cosine similarity needs a non-zero vector")
            }
        })
    }

    fn id_at(&self, row: usize) -> &str {
        let start = if row == 0 { 0 } else { self.id_end[row - 1] as usize };
        &self.ids[start..self.id_end[row] as usize]
    }

    fn push_id(&mut self, id: &str, row: usize) -> Result<(), CatalogError> {
        let hash = self.hasher.hash_one(id);
        if let Some(&first) = self.index.find(hash, |&r| self.id_at(r as usize) == id) {
            return Err(self.row_error(row, "id", format!("{id:?} repeats row {first}")));
        }
        let end = u32::try_from(self.ids.len() + id.len())
            .map_err(|_| self.row_error(row, "id", "the ids total more than 4 GiB"))?;
        let r = u32::try_from(row).map_err(|_| self.row_error(row, "id", "more than 4 Gi rows"))?;
        self.ids.push_str(id);
        self.id_end.push(end);
        let (hasher, ids, id_end) = (&self.hasher, &self.ids, &self.id_end);
        self.index.insert_unique(hash, r, |&r| hash_row(hasher, ids, id_end, r));
        Ok(())
    }

    fn finish(mut self) -> Result<Catalog, CatalogError> {
        let Some(dim) = self.dim else {
            return Err(self.column_error("embedding", "the file has no rows"));
        };
        self.ids.shrink_to_fit();
        self.rows.shrink_to_fit();
        self.id_end.shrink_to_fit();
        self.category.shrink_to_fit();
        Ok(Catalog {
            path: PathBuf::new(),
            stamp: None,
            version: String::new(),
            dim,
            ids: self.ids,
            id_end: self.id_end,
            index: self.index,
            hasher: self.hasher,
            rows: self.rows,
            category: self.category,
            category_names: self.category_names,
        })
    }
}

/// The index hash of row `r`'s id (what the table re-hashes its entries with when it grows).
fn hash_row(hasher: &std::hash::RandomState, ids: &str, id_end: &[u32], r: u32) -> u64 {
    let r = r as usize;
    let start = if r == 0 { 0 } else { id_end[r - 1] as usize };
    hasher.hash_one(&ids[start..id_end[r] as usize])
}

fn is_string(t: &DataType) -> bool {
    match t {
        DataType::Utf8 | DataType::LargeUtf8 | DataType::Utf8View => true,
        DataType::Dictionary(k, v) => **k == DataType::Int32 && is_string(v),
        _ => false,
    }
}

/// The columns the catalog reads, by position in `schema`.
fn wanted(schema: &SchemaRef) -> Vec<usize> {
    ["id", "embedding", "category"].iter().filter_map(|name| schema.index_of(name).ok()).collect()
}

fn read_parquet(bytes: bytes::Bytes, builder: &mut Builder) -> Result<(), CatalogError> {
    use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    use parquet::arrow::ProjectionMask;
    let path = builder.path.clone();
    let format_error =
        |message: String| CatalogError::Format { path: path.clone(), format: "Parquet", message };
    let reader = ParquetRecordBatchReaderBuilder::try_new(bytes).map_err(|e| format_error(e.to_string()))?;
    let schema = reader.schema().clone();
    builder.check_schema(&schema)?;
    let rows = usize::try_from(reader.metadata().file_metadata().num_rows()).unwrap_or(0);
    builder.reserve(rows);
    let mask = ProjectionMask::roots(reader.parquet_schema(), wanted(&schema));
    let batches = reader
        .with_projection(mask)
        .with_batch_size(BATCH_ROWS)
        .build()
        .map_err(|e| format_error(e.to_string()))?;
    for batch in batches {
        let batch = batch.map_err(|e| format_error(e.to_string()))?;
        builder.push_batch(&batch)?;
    }
    Ok(())
}

fn read_ipc(bytes: bytes::Bytes, builder: &mut Builder) -> Result<(), CatalogError> {
    let path = builder.path.clone();
    let format_error =
        |message: String| CatalogError::Format { path: path.clone(), format: "Arrow IPC", message };
    let probe = arrow_ipc::reader::FileReader::try_new(std::io::Cursor::new(bytes.clone()), None)
        .map_err(|e| format_error(e.to_string()))?;
    let schema = probe.schema();
    builder.check_schema(&schema)?;
    drop(probe);
    let reader = arrow_ipc::reader::FileReader::try_new(std::io::Cursor::new(bytes), Some(wanted(&schema)))
        .map_err(|e| format_error(e.to_string()))?;
    for batch in reader {
        let batch = batch.map_err(|e| format_error(e.to_string()))?;
        builder.push_batch(&batch)?;
    }
    Ok(())
}

/// A catalog shared by the engines that serve it.
pub type SharedCatalog = Arc<Catalog>;
