//! `medley.Replay`: the replay grid's accumulators ([`Grid`]) fed with Arrow record batches of
//! logged slates, serialisable and mergeable.
//!
//! One row is one logged slate (the replay schema, README "Python"):
//! `request_id` utf8, `ids` list<utf8>, `scores` list<float64>, `embeddings`
//! list<list<float32>> or list<binary> (f32 little-endian), `categories` list<utf8>, `clicked`
//! list<utf8>, optional `served` list<utf8>, optional `profile` map<utf8, float64>, optional
//! `groups` list<utf8> with `fairness` struct<protected utf8, share float64, alpha float64>. Rows are
//! validated as `medley replay` validates a line (min-max scores, embeddings required); a row
//! without clicks is skipped and counted, an invalid one skipped, counted and its first reasons
//! kept.
//!
//! Why partitions merge exactly: every sum is per cell and additive, the Poisson-bootstrap
//! weights of a slate are a function of its request id alone ([`bootstrap::key_of_id`]), and
//! item exposure is merged by item id ([`Grid::merge`] with an id map). Means agree with one
//! pass to rounding (sums added in another order, about 1e-15 relative).

use std::collections::HashMap;

use arrow_array::cast::AsArray;
use arrow_array::types::{Float32Type, Float64Type};
use arrow_array::{Array, ArrayRef, RecordBatch};
use arrow_pyarrow::PyArrowType;
use arrow_schema::DataType;
use medley_core::bootstrap::{key_of_id, key_of_line};
use medley_core::diversify::{self, Diversifier};
use medley_core::model::{CandidateInput, Limits, RerankInput, ScoreTransform};
use medley_core::replay::{self, Grid, GridOptions, LoggedSlate, SlateRows, StateReader};
use medley_core::Workspace;
use pyo3::prelude::*;
use pyo3::types::{PyBytes, PyDict, PyType};

use crate::error;

/// Leading bytes of [`Replay::to_bytes`]: a name and a format version.
const MAGIC: &[u8; 8] = b"medleyR1";
/// Slates evaluated between adds (bounds the per-slate rows held at once).
const CHUNK: usize = 2048;

/// What a replay evaluates: equal specs are what two replays need to merge.
#[derive(Debug, Clone, PartialEq)]
struct Spec {
    algorithms: Vec<String>,
    lambdas: Vec<f64>,
    windows: Vec<usize>,
    k: usize,
    seed: u64,
}

/// What reading counted.
#[derive(Debug, Clone, Default)]
struct Stats {
    rows: u64,
    slates: u64,
    without_clicks: u64,
    invalid: u64,
    with_served: u64,
    first_invalid: Vec<String>,
}

/// Replay accumulators over logged slates: `Replay(algorithms, lambdas, k, windows=None,
/// seed=0)`, then `.update(batch)` with pyarrow RecordBatches, `.merge(other)`,
/// `.to_bytes()` / `Replay.from_bytes(b)`, and `.table()`, the CLI's frontier as a pandas
/// DataFrame (baseline row first).
#[pyclass(module = "medley")]
pub(crate) struct Replay {
    spec: Spec,
    grid: Grid,
    needs_profile: bool,
    items: HashMap<String, u32>,
    names: Vec<String>,
    stats: Stats,
}

impl Replay {
    fn create(spec: Spec) -> PyResult<Self> {
        let mut algorithms: Vec<&'static dyn Diversifier> = Vec::new();
        for (i, name) in spec.algorithms.iter().enumerate() {
            let a = diversify::by_name(name).ok_or_else(|| {
                let known: Vec<&str> = diversify::names().collect();
                error::raise(
                    "unknown_algorithm",
                    Some(format!("algorithms[{i}]")),
                    format!("unknown algorithm {name:?}; known: {}", known.join(", ")),
                )
            })?;
            algorithms.push(a);
        }
        if algorithms.is_empty() {
            return Err(error::field("algorithms", "name at least one algorithm".into()));
        }
        if spec.lambdas.is_empty() {
            return Err(error::field("lambdas", "give at least one lambda".into()));
        }
        if let Some(i) = spec.lambdas.iter().position(|l| !(0.0..=1.0).contains(l)) {
            return Err(error::raise(
                "lambda_out_of_range",
                Some(format!("lambdas[{i}]")),
                format!("lambda = {} is outside [0, 1]", spec.lambdas[i]),
            ));
        }
        if spec.k == 0 || spec.k > Limits::default().max_k {
            return Err(error::raise(
                "k_out_of_range",
                Some("k".into()),
                format!("k = {} is outside 1..={}", spec.k, Limits::default().max_k),
            ));
        }
        if let Some(w) = spec.windows.iter().find(|w| !(2..=1000).contains(*w)) {
            return Err(error::raise(
                "window_out_of_range",
                Some("windows".into()),
                format!("window = {w} is outside 2..=1000"),
            ));
        }
        let cells = replay::grid_cells(&algorithms, &spec.windows, &spec.lambdas);
        let grid = Grid::new(&cells, GridOptions::new(spec.k)).map_err(|e| error::field("windows", e))?;
        Ok(Self {
            needs_profile: algorithms.iter().any(|a| a.needs_profile()),
            spec,
            grid,
            items: HashMap::new(),
            names: Vec::new(),
            stats: Stats::default(),
        })
    }

    /// The item number of `id`, numbering it when new.
    fn intern(&mut self, id: &str) -> u32 {
        if let Some(&n) = self.items.get(id) {
            return n;
        }
        let n = u32::try_from(self.names.len()).unwrap_or(u32::MAX);
        self.items.insert(id.to_owned(), n);
        self.names.push(id.to_owned());
        n
    }

    /// Reads, validates and evaluates one batch (GIL released by the caller).
    fn add_batch(&mut self, batch: &RecordBatch) -> Result<(), PyErr> {
        let columns = Columns::of(batch).map_err(|e| error::field("batch", e))?;
        let mut ws = Workspace::new();
        let mut pending: Vec<LoggedSlate> = Vec::with_capacity(CHUNK.min(batch.num_rows()));
        for row in 0..batch.num_rows() {
            self.stats.rows += 1;
            match columns.slate(row, self.stats.rows, self.spec.seed) {
                Ok(None) => self.stats.without_clicks += 1,
                Err(reason) => {
                    self.stats.invalid += 1;
                    if self.stats.first_invalid.len() < 5 {
                        self.stats.first_invalid.push(format!("row {}: {reason}", self.stats.rows));
                    }
                }
                Ok(Some(mut slate)) => {
                    if self.needs_profile && slate.input.profile().is_none() {
                        return Err(error::raise(
                            "missing_profile",
                            Some("profile".into()),
                            format!(
                                "calibrated needs a profile on every logged slate; row {} (counted over all batches) has none",
                                self.stats.rows
                            ),
                        ));
                    }
                    slate.item = slate.input.ids().iter().map(|id| self.intern(id)).collect();
                    self.stats.slates += 1;
                    self.stats.with_served += u64::from(slate.served_rank.is_some());
                    pending.push(slate);
                    if pending.len() == CHUNK {
                        self.evaluate(&mut pending, &mut ws)?;
                    }
                }
            }
        }
        self.evaluate(&mut pending, &mut ws)
    }

    fn evaluate(&mut self, pending: &mut Vec<LoggedSlate>, ws: &mut Workspace) -> PyResult<()> {
        let rows = pending
            .iter()
            .map(|s| self.grid.evaluate(s, ws))
            .collect::<Result<Vec<SlateRows>, _>>()
            .map_err(|e| error::kernel(&e))?;
        self.grid.add(&rows, self.names.len());
        pending.clear();
        Ok(())
    }

    fn write(&self) -> Vec<u8> {
        let mut out = MAGIC.to_vec();
        let u = |x: u64, out: &mut Vec<u8>| out.extend(x.to_le_bytes());
        let s = |x: &str, out: &mut Vec<u8>| {
            out.extend((x.len() as u64).to_le_bytes());
            out.extend(x.as_bytes());
        };
        u(self.spec.algorithms.len() as u64, &mut out);
        self.spec.algorithms.iter().for_each(|a| s(a, &mut out));
        u(self.spec.lambdas.len() as u64, &mut out);
        self.spec.lambdas.iter().for_each(|l| u(l.to_bits(), &mut out));
        u(self.spec.windows.len() as u64, &mut out);
        self.spec.windows.iter().for_each(|&w| u(w as u64, &mut out));
        u(self.spec.k as u64, &mut out);
        u(self.spec.seed, &mut out);
        let st = &self.stats;
        for x in [st.rows, st.slates, st.without_clicks, st.invalid, st.with_served] {
            u(x, &mut out);
        }
        u(st.first_invalid.len() as u64, &mut out);
        st.first_invalid.iter().for_each(|r| s(r, &mut out));
        u(self.names.len() as u64, &mut out);
        self.names.iter().for_each(|n| s(n, &mut out));
        self.grid.write_state(&mut out);
        out
    }

    fn read(bytes: &[u8]) -> Result<Self, String> {
        let mut r = StateReader::new(bytes);
        if r.take(MAGIC.len())? != MAGIC {
            return Err("not a medley.Replay state (it does not start with the replay's header)".into());
        }
        let string = |r: &mut StateReader<'_>| -> Result<String, String> {
            let n = r.u64()? as usize;
            let b = r.take(n)?;
            String::from_utf8(b.to_vec()).map_err(|_| "a name in the state is not UTF-8".to_owned())
        };
        let count = |r: &mut StateReader<'_>| -> Result<usize, String> {
            let n = r.u64()? as usize;
            if n > r.remaining() / 8 {
                return Err("the state ends early (truncated or not a replay state)".into());
            }
            Ok(n)
        };
        let n = count(&mut r)?;
        let algorithms = (0..n).map(|_| string(&mut r)).collect::<Result<_, _>>()?;
        let n = count(&mut r)?;
        let lambdas = (0..n).map(|_| r.f64()).collect::<Result<_, _>>()?;
        let n = count(&mut r)?;
        let windows = (0..n).map(|_| r.u64().map(|w| w as usize)).collect::<Result<_, _>>()?;
        let k = r.u64()? as usize;
        let seed = r.u64()?;
        let spec = Spec { algorithms, lambdas, windows, k, seed };
        let mut this = Self::create(spec).map_err(|e| e.to_string())?;
        let st = &mut this.stats;
        for x in [&mut st.rows, &mut st.slates, &mut st.without_clicks, &mut st.invalid, &mut st.with_served]
        {
            *x = r.u64()?;
        }
        let n = count(&mut r)?;
        st.first_invalid = (0..n).map(|_| string(&mut r)).collect::<Result<_, _>>()?;
        let n = count(&mut r)?;
        for _ in 0..n {
            let name = string(&mut r)?;
            this.intern(&name);
        }
        this.grid.read_state(&mut r)?;
        if r.remaining() != 0 {
            return Err(format!("{} bytes follow the replay state", r.remaining()));
        }
        Ok(this)
    }
}

#[pymethods]
impl Replay {
    #[new]
    #[pyo3(signature = (algorithms, lambdas, k, windows=None, seed=0))]
    fn new(
        algorithms: Vec<String>,
        lambdas: Vec<f64>,
        k: i64,
        windows: Option<Vec<i64>>,
        seed: u64,
    ) -> PyResult<Self> {
        let k = usize::try_from(k).unwrap_or(0);
        let windows =
            windows.unwrap_or_default().into_iter().map(|w| usize::try_from(w).unwrap_or(0)).collect();
        Self::create(Spec { algorithms, lambdas, windows, k, seed })
    }

    /// Adds the logged slates of a pyarrow RecordBatch (the replay schema).
    fn update(&mut self, py: Python<'_>, batch: PyArrowType<RecordBatch>) -> PyResult<()> {
        let batch = batch.0;
        py.detach(|| self.add_batch(&batch))
    }

    /// Adds another replay's accumulators (same algorithms, lambdas, windows, k and seed).
    fn merge(&mut self, py: Python<'_>, other: PyRef<'_, Self>) -> PyResult<()> {
        if other.spec != self.spec {
            return Err(error::raise(
                "grid_mismatch",
                None,
                format!("the replays evaluate different grids: {:?} and {:?}", self.spec, other.spec),
            ));
        }
        let other = &*other;
        py.detach(|| {
            let map: Vec<u32> = other.names.iter().map(|n| self.intern(n)).collect();
            self.grid
                .merge(&other.grid, &map, self.names.len())
                .map_err(|e| error::raise("grid_mismatch", None, e))?;
            let (a, b) = (&mut self.stats, &other.stats);
            a.rows += b.rows;
            a.slates += b.slates;
            a.without_clicks += b.without_clicks;
            a.invalid += b.invalid;
            a.with_served += b.with_served;
            let room = 5_usize.saturating_sub(a.first_invalid.len());
            a.first_invalid.extend(b.first_invalid.iter().take(room).cloned());
            Ok(())
        })
    }

    /// The accumulators as bytes (a few tens of KB per cell plus 8 bytes and the id per item).
    fn to_bytes<'py>(&self, py: Python<'py>) -> Bound<'py, PyBytes> {
        PyBytes::new(py, &self.write())
    }

    /// A replay from [`Replay::to_bytes`].
    #[classmethod]
    fn from_bytes(_cls: &Bound<'_, PyType>, data: &[u8]) -> PyResult<Self> {
        Self::read(data).map_err(|e| error::field("data", e))
    }

    fn __reduce__<'py>(slf: &Bound<'py, Self>) -> PyResult<(Bound<'py, PyAny>, (Bound<'py, PyBytes>,))> {
        let py = slf.py();
        let from = slf.get_type().getattr("from_bytes")?;
        Ok((from, (PyBytes::new(py, &slf.borrow().write()),)))
    }

    /// Counts: rows read, slates evaluated, rows without clicks, invalid rows (and the first
    /// reasons), slates with the served slate, distinct items.
    #[getter]
    fn stats<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyDict>> {
        let d = PyDict::new(py);
        let st = &self.stats;
        d.set_item("rows", st.rows)?;
        d.set_item("slates", st.slates)?;
        d.set_item("without_clicks", st.without_clicks)?;
        d.set_item("invalid", st.invalid)?;
        d.set_item("first_invalid", st.first_invalid.clone())?;
        d.set_item("with_served", st.with_served)?;
        d.set_item("items", self.names.len())?;
        Ok(d)
    }

    /// The frontier as a pandas DataFrame with `medley replay`'s `frontier.csv` columns: the
    /// baseline row (`algorithm` = "baseline") first, then one row per cell; NaN where no slate
    /// had the input (profile, fairness floor, served slate). `attrs["stats"]` holds
    /// [`Replay::stats`].
    fn table<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyAny>> {
        let points = self.grid.points();
        let columns = PyDict::new(py);
        let labels: Vec<&str> =
            points.iter().enumerate().map(|(i, p)| if i == 0 { "baseline" } else { p.algorithm }).collect();
        columns.set_item("algorithm", labels)?;
        columns.set_item("lambda", points.iter().map(|p| p.lambda).collect::<Vec<_>>())?;
        columns.set_item("window", points.iter().map(|p| p.window).collect::<Vec<_>>())?;
        let values: Vec<[Option<f64>; 20]> = points.iter().map(medley_core::replay::Point::values).collect();
        for (j, name) in medley_core::replay::REPORT_COLUMNS.iter().enumerate() {
            columns.set_item(*name, values.iter().map(|v| v[j].unwrap_or(f64::NAN)).collect::<Vec<_>>())?;
        }
        let frame = py.import("pandas")?.getattr("DataFrame")?.call1((columns,))?;
        frame.getattr("attrs")?.set_item("stats", self.stats(py)?)?;
        Ok(frame)
    }

    fn __repr__(&self) -> String {
        format!(
            "Replay(algorithms={:?}, lambdas={:?}, k={}, windows={:?}, seed={}; {} slates, {} items)",
            self.spec.algorithms,
            self.spec.lambdas,
            self.spec.k,
            self.spec.windows,
            self.spec.seed,
            self.stats.slates,
            self.names.len()
        )
    }
}

/// The replay schema's columns of one batch.
struct Columns {
    request_id: Option<ArrayRef>,
    ids: ArrayRef,
    scores: ArrayRef,
    embeddings: ArrayRef,
    categories: Option<ArrayRef>,
    clicked: ArrayRef,
    served: Option<ArrayRef>,
    profile: Option<ArrayRef>,
    groups: Option<ArrayRef>,
    fairness: Option<ArrayRef>,
}

impl Columns {
    fn of(batch: &RecordBatch) -> Result<Self, String> {
        let need = |name: &str| {
            batch.column_by_name(name).cloned().ok_or_else(|| {
                format!("the batch has no {name:?} column (the replay schema: request_id, ids, scores, embeddings, categories, clicked, served, profile)")
            })
        };
        let may = |name: &str| batch.column_by_name(name).cloned();
        Ok(Self {
            request_id: may("request_id"),
            ids: need("ids")?,
            scores: need("scores")?,
            embeddings: need("embeddings")?,
            categories: may("categories"),
            clicked: need("clicked")?,
            served: may("served"),
            profile: may("profile"),
            groups: may("groups"),
            fairness: may("fairness"),
        })
    }

    /// Row `row` as a logged slate; `Ok(None)` without clicks; `number` counts rows over all
    /// batches (the bootstrap key of a row without a request id).
    fn slate(&self, row: usize, number: u64, seed: u64) -> Result<Option<LoggedSlate>, String> {
        let clicked = match list_value(&self.clicked, row, "clicked")? {
            Some(v) => strings(&v, "clicked")?.into_iter().flatten().collect::<Vec<String>>(),
            None => Vec::new(),
        };
        if clicked.is_empty() {
            return Ok(None);
        }
        let request_id = match &self.request_id {
            Some(col) => string_at(col.as_ref(), row, "request_id")?,
            None => None,
        };
        let key = request_id.as_deref().map_or_else(|| key_of_line(number), key_of_id);
        let key = if seed == 0 { key } else { key ^ mix(seed) };
        let ids = list_value(&self.ids, row, "ids")?.ok_or("ids is null")?;
        let ids = strings(&ids, "ids")?;
        let n = ids.len();
        let scores = list_value(&self.scores, row, "scores")?.ok_or("scores is null")?;
        let scores = floats(&scores, "scores")?;
        if scores.len() != n {
            return Err(format!("{} scores for {n} ids", scores.len()));
        }
        let embeddings = match list_value(&self.embeddings, row, "embeddings")? {
            Some(e) => embedding_rows(&e)?,
            None => vec![None; n],
        };
        if embeddings.len() != n {
            return Err(format!("{} embeddings for {n} ids", embeddings.len()));
        }
        let categories =
            match self.categories.as_ref().map(|c| list_value(c, row, "categories")).transpose()?.flatten() {
                Some(c) => strings(&c, "categories")?,
                None => vec![None; n],
            };
        if categories.len() != n {
            return Err(format!("{} categories for {n} ids", categories.len()));
        }
        let candidates = ids
            .into_iter()
            .zip(scores)
            .zip(embeddings)
            .zip(categories)
            .enumerate()
            .map(|(i, (((id, score), embedding), category))| {
                let id = id.ok_or_else(|| format!("ids[{i}] is null"))?;
                Ok(CandidateInput { id, score, category, embedding })
            })
            .collect::<Result<Vec<_>, String>>()?;
        let mut input = RerankInput::new(candidates, ScoreTransform::MinMax, true, &Limits::default())
            .map_err(|e| format!("{}: {e}", e.code()))?;
        if let Some(profile) = self.profile.as_ref().map(|p| profile_value(p, row)).transpose()?.flatten() {
            input = input.with_profile(profile).map_err(|e| format!("{}: {e}", e.code()))?;
        }
        if let Some((protected, share, alpha)) =
            self.fairness.as_ref().map(|f| fairness_value(f, row)).transpose()?.flatten()
        {
            let groups =
                match self.groups.as_ref().map(|g| list_value(g, row, "groups")).transpose()?.flatten() {
                    Some(g) => strings(&g, "groups")?,
                    None => vec![None; input.len()],
                };
            if groups.len() != input.len() {
                return Err(format!("{} groups for {} ids", groups.len(), input.len()));
            }
            let flags = groups.iter().map(|g| g.as_deref() == Some(protected.as_str())).collect();
            input = input.with_fairness(flags, share, alpha).map_err(|e| format!("{}: {e}", e.code()))?;
        }
        let served = match self.served.as_ref().map(|s| list_value(s, row, "served")).transpose()?.flatten() {
            Some(s) => Some(strings(&s, "served")?.into_iter().flatten().collect::<Vec<String>>()),
            None => None,
        };
        Ok(Some(LoggedSlate::new(input, &clicked, served.as_deref(), key, number)))
    }
}

/// SplitMix64's finaliser: spreads a seed over the key's bits.
fn mix(x: u64) -> u64 {
    let mut z = x.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// Row `row` of a list column (list, large list or fixed-size list); `None` when null.
fn list_value(col: &ArrayRef, row: usize, name: &str) -> Result<Option<ArrayRef>, String> {
    if col.is_null(row) {
        return Ok(None);
    }
    Ok(Some(match col.data_type() {
        DataType::List(_) => col.as_list::<i32>().value(row),
        DataType::LargeList(_) => col.as_list::<i64>().value(row),
        DataType::FixedSizeList(..) => col.as_fixed_size_list().value(row),
        other => return Err(format!("{name} is {other}; want a list")),
    }))
}

/// A string array's values (utf8, large utf8 or utf8 view).
fn strings(a: &dyn Array, name: &str) -> Result<Vec<Option<String>>, String> {
    let own = |s: Option<&str>| s.map(str::to_owned);
    Ok(match a.data_type() {
        DataType::Utf8 => a.as_string::<i32>().iter().map(own).collect(),
        DataType::LargeUtf8 => a.as_string::<i64>().iter().map(own).collect(),
        DataType::Utf8View => a.as_string_view().iter().map(own).collect(),
        DataType::Null => vec![None; a.len()],
        other => return Err(format!("{name} holds {other}; want utf8")),
    })
}

/// One value of a string array.
fn string_at(a: &dyn Array, row: usize, name: &str) -> Result<Option<String>, String> {
    if a.is_null(row) {
        return Ok(None);
    }
    Ok(Some(match a.data_type() {
        DataType::Utf8 => a.as_string::<i32>().value(row).to_owned(),
        DataType::LargeUtf8 => a.as_string::<i64>().value(row).to_owned(),
        DataType::Utf8View => a.as_string_view().value(row).to_owned(),
        other => return Err(format!("{name} is {other}; want utf8")),
    }))
}

/// A float array's values as f64 (float64, or float32 widened exactly); a null is an error.
fn floats(a: &dyn Array, name: &str) -> Result<Vec<f64>, String> {
    if a.null_count() > 0 {
        return Err(format!("{name} holds a null"));
    }
    Ok(match a.data_type() {
        DataType::Float64 => a.as_primitive::<Float64Type>().values().to_vec(),
        DataType::Float32 => a.as_primitive::<Float32Type>().values().iter().map(|&x| f64::from(x)).collect(),
        other => return Err(format!("{name} holds {other}; want float64")),
    })
}

/// One row's embeddings: a list of f32 lists (or f64, rounded to f32), or of f32le binaries.
fn embedding_rows(a: &ArrayRef) -> Result<Vec<Option<Vec<f32>>>, String> {
    let mut out = Vec::with_capacity(a.len());
    match a.data_type() {
        DataType::Binary | DataType::LargeBinary | DataType::FixedSizeBinary(_) | DataType::BinaryView => {
            for i in 0..a.len() {
                if a.is_null(i) {
                    out.push(None);
                    continue;
                }
                let bytes: &[u8] = match a.data_type() {
                    DataType::Binary => a.as_binary::<i32>().value(i),
                    DataType::LargeBinary => a.as_binary::<i64>().value(i),
                    DataType::BinaryView => a.as_binary_view().value(i),
                    _ => a.as_fixed_size_binary().value(i),
                };
                if !bytes.len().is_multiple_of(4) {
                    return Err(format!(
                        "embeddings[{i}] holds {} bytes, not a whole number of f32",
                        bytes.len()
                    ));
                }
                out.push(Some(
                    bytes.chunks_exact(4).map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]])).collect(),
                ));
            }
        }
        _ => {
            for i in 0..a.len() {
                let Some(v) = list_value(a, i, "embeddings")? else {
                    out.push(None);
                    continue;
                };
                if v.null_count() > 0 {
                    return Err(format!("embeddings[{i}] holds a null"));
                }
                out.push(Some(match v.data_type() {
                    DataType::Float32 => v.as_primitive::<Float32Type>().values().to_vec(),
                    DataType::Float64 => {
                        v.as_primitive::<Float64Type>().values().iter().map(|&x| x as f32).collect()
                    }
                    other => return Err(format!("embeddings[{i}] holds {other}; want float32")),
                }));
            }
        }
    }
    Ok(out)
}

/// Row `row` of the fairness struct column: (protected, share, alpha).
fn fairness_value(col: &ArrayRef, row: usize) -> Result<Option<(String, f64, f64)>, String> {
    if col.is_null(row) {
        return Ok(None);
    }
    let DataType::Struct(_) = col.data_type() else {
        return Err(format!(
            "fairness is {}; want struct<protected: utf8, share: float64, alpha: float64>",
            col.data_type()
        ));
    };
    let s = col.as_struct();
    let field = |name: &str| s.column_by_name(name).ok_or_else(|| format!("fairness has no {name:?} field"));
    let protected = string_at(field("protected")?.as_ref(), row, "fairness.protected")?
        .ok_or("fairness.protected is null")?;
    let num = |name: &str| -> Result<f64, String> {
        let c = field(name)?;
        let v = floats(&c.slice(row, 1), &format!("fairness.{name}"))?;
        Ok(v[0])
    };
    Ok(Some((protected, num("share")?, num("alpha")?)))
}

/// Row `row` of the profile map column, keys in order (as the service's JSON map).
fn profile_value(col: &ArrayRef, row: usize) -> Result<Option<Vec<(String, f64)>>, String> {
    if col.is_null(row) {
        return Ok(None);
    }
    let DataType::Map(..) = col.data_type() else {
        return Err(format!("profile is {}; want map<utf8, float64>", col.data_type()));
    };
    let entries = col.as_map().value(row);
    let keys = strings(entries.column(0).as_ref(), "profile keys")?;
    let values = floats(entries.column(1).as_ref(), "profile values")?;
    // A repeated key keeps its last weight, as the service's JSON map does.
    let map: std::collections::BTreeMap<String, f64> =
        keys.into_iter().zip(values).filter_map(|(k, v)| k.map(|k| (k, v))).collect();
    Ok(Some(map.into_iter().collect()))
}
