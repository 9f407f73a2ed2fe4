//! `medley.rerank` and `medley.measures`: one slate through a diversifier of the registry, and
//! the diversity of a slate, on numpy arrays.
//!
//! The arrays are read in place (a float64 `scores` vector and a C-contiguous float32 or
//! float64 `embeddings` matrix; anything else is converted once by numpy), copied into a
//! validated [`RerankInput`] exactly as the service builds one, and the kernel runs with the
//! GIL released on a per-thread [`Workspace`]. Candidate ids are the row numbers, so the answer
//! is indices into the inputs.

use std::cell::RefCell;
use std::collections::BTreeMap;

use medley_core::diversify;
use medley_core::measures as m;
use medley_core::model::{Limits, Params, RerankInput, ScoreTransform, MAX_LABEL_BYTES};
use medley_core::Workspace;
use numpy::{PyArray1, PyReadonlyArray1, PyReadonlyArray2, PyUntypedArrayMethods};
use pyo3::prelude::*;
use pyo3::types::PyDict;

use crate::error;

/// Limits of the Python API: the service's defaults are for a network edge; a notebook may
/// re-rank larger lists. Memory is the caller's.
pub(crate) const LIMITS: Limits = Limits { max_candidates: 1_000_000, max_dim: 65_536, max_k: 100_000 };

thread_local! {
    /// One kernel workspace per thread, reused across calls.
    static WORKSPACE: RefCell<Workspace> = RefCell::new(Workspace::new());
}

/// An embedding matrix read in place: f32 rows, or f64 rows rounded to f32 as they are copied.
enum Rows<'a> {
    F32(&'a [f32]),
    F64(&'a [f64]),
}

/// Scores as a float64 vector, converted by numpy when they are not one already.
fn scores_array<'py>(py: Python<'py>, scores: &Bound<'py, PyAny>) -> PyResult<PyReadonlyArray1<'py, f64>> {
    if let Ok(a) = scores.extract::<PyReadonlyArray1<'py, f64>>() {
        if a.is_c_contiguous() {
            return Ok(a);
        }
    }
    let np = py.import("numpy")?;
    let converted = np
        .call_method1("ascontiguousarray", (scores, "float64"))
        .map_err(|e| error::field("scores", format!("scores must be a 1-D array of numbers: {e}")))?;
    converted.extract::<PyReadonlyArray1<'py, f64>>().map_err(|_| {
        let ndim = converted.getattr("ndim").and_then(|n| n.extract::<usize>()).unwrap_or(0);
        error::field("scores", format!("scores must be a 1-D array; got {ndim} dimensions"))
    })
}

/// Embeddings as a C-contiguous 2-D float32 or float64 array.
enum Matrix<'py> {
    F32(PyReadonlyArray2<'py, f32>),
    F64(PyReadonlyArray2<'py, f64>),
}

impl Matrix<'_> {
    fn shape(&self) -> (usize, usize) {
        let s = match self {
            Self::F32(a) => a.shape(),
            Self::F64(a) => a.shape(),
        };
        (s[0], s[1])
    }

    fn rows(&self) -> PyResult<Rows<'_>> {
        let not = |_| error::field("embeddings", "embeddings must be C-contiguous".into());
        Ok(match self {
            Self::F32(a) => Rows::F32(a.as_slice().map_err(not)?),
            Self::F64(a) => Rows::F64(a.as_slice().map_err(not)?),
        })
    }
}

fn matrix<'py>(py: Python<'py>, e: &Bound<'py, PyAny>) -> PyResult<Matrix<'py>> {
    if let Ok(a) = e.extract::<PyReadonlyArray2<'py, f32>>() {
        if a.is_c_contiguous() {
            return Ok(Matrix::F32(a));
        }
    }
    if let Ok(a) = e.extract::<PyReadonlyArray2<'py, f64>>() {
        if a.is_c_contiguous() {
            return Ok(Matrix::F64(a));
        }
    }
    let np = py.import("numpy")?;
    let converted = np.call_method1("ascontiguousarray", (e, "float32")).map_err(|err| {
        error::field("embeddings", format!("embeddings must be a 2-D array of numbers: {err}"))
    })?;
    converted.extract::<PyReadonlyArray2<'py, f32>>().map(Matrix::F32).map_err(|_| {
        let ndim = converted.getattr("ndim").and_then(|n| n.extract::<usize>()).unwrap_or(0);
        error::field(
            "embeddings",
            format!("embeddings must be a 2-D array (rows, dimension); got {ndim} dimensions"),
        )
    })
}

/// Optional per-candidate labels (`categories`, `groups`): a sequence of str or None.
fn labels(arg: Option<&Bound<'_, PyAny>>, name: &str, n: usize) -> PyResult<Option<Vec<Option<String>>>> {
    let Some(arg) = arg.filter(|a| !a.is_none()) else { return Ok(None) };
    if arg.is_instance_of::<pyo3::types::PyString>() {
        return Err(error::field(name, format!("{name} must be a sequence of str or None, not one str")));
    }
    let mut out = Vec::with_capacity(n);
    for (i, item) in
        arg.try_iter().map_err(|_| error::field(name, format!("{name} must be a sequence")))?.enumerate()
    {
        let item = item?;
        if item.is_none() {
            out.push(None);
        } else {
            let s: String = item.extract().map_err(|_| {
                error::field(&format!("{name}[{i}]"), format!("{name}[{i}] must be a str or None"))
            })?;
            out.push(Some(s));
        }
    }
    if out.len() != n {
        return Err(error::field(name, format!("{name} has {} entries for {n} scores", out.len())));
    }
    Ok(Some(out))
}

/// A `{"category": weight}` dict, in key order.
fn profile_of(arg: Option<&Bound<'_, PyAny>>) -> PyResult<Option<Vec<(String, f64)>>> {
    let Some(arg) = arg.filter(|a| !a.is_none()) else { return Ok(None) };
    let map: BTreeMap<String, f64> = arg.extract().map_err(|_| {
        error::field("profile", "profile must be a dict of category -> weight (float)".into())
    })?;
    Ok(Some(map.into_iter().collect()))
}

/// A fairness floor `{"protected": group, "share": p, "alpha": a}`.
struct Fairness {
    protected: String,
    share: f64,
    alpha: f64,
}

fn fairness_of(arg: Option<&Bound<'_, PyAny>>) -> PyResult<Option<Fairness>> {
    let Some(arg) = arg.filter(|a| !a.is_none()) else { return Ok(None) };
    let dict = arg.cast::<PyDict>().map_err(|_| {
        error::field("fairness", "fairness must be a dict with protected, share, alpha".into())
    })?;
    let get = |key: &str| -> PyResult<Bound<'_, PyAny>> {
        dict.get_item(key)?
            .ok_or_else(|| error::field(&format!("fairness.{key}"), format!("fairness needs {key:?}")))
    };
    let protected: String = get("protected")?
        .extract()
        .map_err(|_| error::field("fairness.protected", "must be a str".into()))?;
    if protected.len() > MAX_LABEL_BYTES {
        return Err(error::raise(
            "too_long",
            Some("fairness.protected".into()),
            format!("fairness.protected is {} bytes; the limit is {MAX_LABEL_BYTES}", protected.len()),
        ));
    }
    let num = |key: &str| -> PyResult<f64> {
        get(key)?.extract().map_err(|_| error::field(&format!("fairness.{key}"), "must be a number".into()))
    };
    Ok(Some(Fairness { protected, share: num("share")?, alpha: num("alpha")? }))
}

/// Builds the validated slate the service would build from these arguments.
#[allow(clippy::too_many_arguments)]
fn build_input(
    scores: &[f64],
    rows: Option<(Rows<'_>, usize)>,
    categories: Option<Vec<Option<String>>>,
    groups: Option<&[Option<String>]>,
    profile: Option<Vec<(String, f64)>>,
    fairness: Option<&Fairness>,
    transform: ScoreTransform,
    needs_embeddings: bool,
) -> PyResult<RerankInput> {
    let have_embeddings = rows.is_some();
    let n = scores.len();
    let ids: Vec<String> = (0..n).map(|i| i.to_string()).collect();
    let categories = categories.unwrap_or_else(|| vec![None; n]);
    // float64 rows are rounded to f32 once, as the JSON wire rounds each value it parses.
    let rounded: Vec<f32>;
    let matrix = match rows {
        None => None,
        Some((Rows::F32(x), d)) => Some((x, d)),
        Some((Rows::F64(x), d)) => {
            rounded = x.iter().map(|&v| v as f32).collect();
            Some((rounded.as_slice(), d))
        }
    };
    let invalid = |e: medley_core::ValidationError| error::invalid(&e, have_embeddings);
    let mut input =
        RerankInput::from_columns(ids, scores, categories, matrix, transform, needs_embeddings, &LIMITS)
            .map_err(invalid)?;
    if let Some(weights) = profile {
        input = input.with_profile(weights).map_err(invalid)?;
    }
    if let Some(f) = fairness {
        let protected = match groups {
            Some(g) => g.iter().map(|g| g.as_deref() == Some(f.protected.as_str())).collect(),
            None => vec![false; scores.len()],
        };
        input = input.with_fairness(protected, f.share, f.alpha).map_err(invalid)?;
    }
    Ok(input)
}

/// `medley.rerank(scores, embeddings=None, categories=None, *, algorithm="dpp", lam=0.3, k=10,
/// window=None, profile=None, groups=None, fairness=None, max_per_category=None,
/// score_transform="minmax")`: the slate as indices into the inputs (int64), in slate order.
///
/// Validation and kernels are the service's, so the picks equal `medley rerank` on the same
/// request; raises `RerankError` with the service's code.
#[pyfunction]
#[pyo3(signature = (scores, embeddings=None, categories=None, *, algorithm="dpp", lam=0.3, k=10, window=None, profile=None, groups=None, fairness=None, max_per_category=None, score_transform="minmax"))]
#[allow(clippy::too_many_arguments)]
pub(crate) fn rerank<'py>(
    py: Python<'py>,
    scores: &Bound<'py, PyAny>,
    embeddings: Option<&Bound<'py, PyAny>>,
    categories: Option<&Bound<'py, PyAny>>,
    algorithm: &str,
    lam: f64,
    k: i64,
    window: Option<i64>,
    profile: Option<&Bound<'py, PyAny>>,
    groups: Option<&Bound<'py, PyAny>>,
    fairness: Option<&Bound<'py, PyAny>>,
    max_per_category: Option<i64>,
    score_transform: &str,
) -> PyResult<Bound<'py, PyArray1<i64>>> {
    let diversifier = diversify::by_name(algorithm).ok_or_else(|| {
        let known: Vec<&str> = diversify::names().collect();
        error::raise(
            "unknown_algorithm",
            Some("algorithm".into()),
            format!("unknown algorithm {algorithm:?}; known: {}", known.join(", ")),
        )
    })?;
    let transform = ScoreTransform::from_name(score_transform).ok_or_else(|| {
        error::field(
            "score_transform",
            format!("unknown score_transform {score_transform:?}; want minmax or none"),
        )
    })?;
    let k = u64::try_from(k).map_err(|_| {
        error::raise("k_out_of_range", Some("k".into()), format!("k = {k} is outside 1..={}", LIMITS.max_k))
    })?;
    let window = match window.map(u64::try_from) {
        None => None,
        Some(Ok(w)) => Some(w),
        Some(Err(_)) => {
            return Err(error::raise(
                "window_out_of_range",
                Some("window".into()),
                format!("window = {} is outside 2..=1000", window.unwrap_or(0)),
            ))
        }
    };
    let cap = match max_per_category {
        None => None,
        Some(c) if c >= 1 => Some(c as usize),
        Some(c) => {
            return Err(error::field(
                "max_per_category",
                format!("max_per_category must be at least 1; got {c}"),
            ))
        }
    };
    let params = Params::new(k, lam, &LIMITS)
        .and_then(|p| p.with_window(window))
        .map_err(|e| error::invalid(&e, false))?
        .with_max_per_category(cap);
    let scores = scores_array(py, scores)?;
    let n = scores.len();
    let matrix = match embeddings.filter(|e| !e.is_none()) {
        None => None,
        Some(e) => Some(matrix(py, e)?),
    };
    if let Some(m) = &matrix {
        let (rows, _) = m.shape();
        if rows != n {
            return Err(error::field("embeddings", format!("embeddings has {rows} rows for {n} scores")));
        }
    }
    let categories = labels(categories, "categories", n)?;
    let groups = labels(groups, "groups", n)?;
    if let Some(g) = groups
        .as_ref()
        .and_then(|g| g.iter().position(|x| x.as_ref().is_some_and(|s| s.len() > MAX_LABEL_BYTES)))
    {
        return Err(error::raise(
            "too_long",
            Some(format!("groups[{g}]")),
            format!("groups[{g}] is longer than {MAX_LABEL_BYTES} bytes"),
        ));
    }
    let profile = profile_of(profile)?;
    if profile.is_none() && diversifier.needs_profile() {
        return Err(error::raise(
            "missing_profile",
            Some("profile".into()),
            format!(
                "{} calibrates the slate to a taste profile: pass profile={{\"category\": weight, ...}}",
                diversifier.name()
            ),
        ));
    }
    let fairness = fairness_of(fairness)?;
    let scores = scores.as_slice().map_err(|_| error::field("scores", "scores must be contiguous".into()))?;
    let rows = match &matrix {
        None => None,
        Some(m) => Some((m.rows()?, m.shape().1)),
    };
    let picked = py.detach(|| -> PyResult<Vec<i64>> {
        let input = build_input(
            scores,
            rows,
            categories,
            groups.as_deref(),
            profile,
            fairness.as_ref(),
            transform,
            diversifier.needs_embeddings(),
        )?;
        let selection = WORKSPACE
            .with_borrow_mut(|ws| diversifier.select(&input, &params, ws))
            .map_err(|e| error::kernel(&e))?;
        Ok(selection.indices.into_iter().map(|i| i as i64).collect())
    })?;
    Ok(PyArray1::from_vec(py, picked))
}

/// `medley.measures(indices, categories=None, embeddings=None, profile=None)`: the slate's
/// `category_entropy_bits`, `distinct_categories`, `intra_list_distance` (None without
/// embeddings) and `miscalibration` (None without a profile), as the service reports them.
#[pyfunction]
#[pyo3(signature = (indices, categories=None, embeddings=None, profile=None))]
pub(crate) fn measures<'py>(
    py: Python<'py>,
    indices: &Bound<'py, PyAny>,
    categories: Option<&Bound<'py, PyAny>>,
    embeddings: Option<&Bound<'py, PyAny>>,
    profile: Option<&Bound<'py, PyAny>>,
) -> PyResult<Bound<'py, PyDict>> {
    let matrix = match embeddings.filter(|e| !e.is_none()) {
        None => None,
        Some(e) => Some(matrix(py, e)?),
    };
    let n_categories = match categories.filter(|c| !c.is_none()) {
        Some(c) => {
            Some(c.len().map_err(|_| error::field("categories", "categories must be a sequence".into()))?)
        }
        None => None,
    };
    let n = match (n_categories, matrix.as_ref().map(|m| m.shape().0)) {
        (Some(a), Some(b)) if a != b => {
            return Err(error::field("embeddings", format!("embeddings has {b} rows for {a} categories")))
        }
        (Some(a), _) => a,
        (None, Some(b)) => b,
        (None, None) => {
            return Err(error::field("categories", "pass categories, embeddings or both".into()));
        }
    };
    let mut slate = Vec::new();
    for (j, i) in indices
        .try_iter()
        .map_err(|_| error::field("indices", "indices must be a sequence of int".into()))?
        .enumerate()
    {
        let i: i64 =
            i?.extract().map_err(|_| error::field(&format!("indices[{j}]"), "must be an int".into()))?;
        let at = usize::try_from(i)
            .ok()
            .filter(|&i| i < n)
            .ok_or_else(|| error::field(&format!("indices[{j}]"), format!("index {i} is outside 0..{n}")))?;
        if slate.contains(&at) {
            return Err(error::field(&format!("indices[{j}]"), format!("index {at} is repeated")));
        }
        slate.push(at);
    }
    let categories = labels(categories, "categories", n)?;
    let profile = profile_of(profile)?;
    let rows = match &matrix {
        None => None,
        Some(m) => Some((m.rows()?, m.shape().1)),
    };
    let zeros = vec![0.0; n];
    let input = build_input(&zeros, rows, categories, None, profile, None, ScoreTransform::MinMax, false)?;
    let out = PyDict::new(py);
    out.set_item("category_entropy_bits", m::category_entropy_bits(&input, &slate))?;
    out.set_item("distinct_categories", m::distinct_categories(&input, &slate))?;
    out.set_item("intra_list_distance", m::intra_list_distance(&input, &slate))?;
    out.set_item("miscalibration", m::miscalibration(&input, &slate))?;
    Ok(out)
}

/// The registered algorithm names.
#[pyfunction]
pub(crate) fn algorithms() -> Vec<&'static str> {
    diversify::names().collect()
}
