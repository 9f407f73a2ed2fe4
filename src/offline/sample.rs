//! `medley sample`: a demo corpus in an invented scenario, an outdoor-gear shop, so that
//! diversification has something real to trade.
//!
//! The catalogue has six categories (tents, stoves, footwear, packs, navigation, apparel) with a
//! centroid each; an item's embedding is its category centroid plus noise, so embeddings cluster
//! by category. Categories differ in popularity, so a request's candidates are dominated by one
//! or two of them. Each user has a taste vector (mostly one favourite category, partly a second)
//! and the score a ranking model would give is a noisy reading of the affinity between taste and
//! item. With `--with-clicks` each request also lists held-out positives: items drawn from the
//! user's *true* affinity (a different noise draw than the score, plus an appetite for the second
//! category), so they are not simply the top scores and offline accuracy means something.
//! `--with-profiles` adds each user's taste mix over categories as a `"profile"` (for
//! calibration), and `--with-groups` each candidate's maker `"group"` (independent makers, whom
//! the ranking model under-scores, or mainline) with a fairness floor for the independents.
//!
//! Everything derives from the seed through SplitMix64 (Steele, Lea & Flood, "Fast splittable
//! pseudorandom number generators", OOPSLA 2014) and Box–Muller normals, so a seed always writes
//! the same bytes.

use std::io::Write;

use serde_json::{json, Value};

/// Categories of the invented shop, most popular first, with id prefixes and popularity weights.
pub const CATEGORIES: [(&str, &str, f64); 6] = [
    ("tents", "tent", 0.34),
    ("footwear", "boot", 0.22),
    ("packs", "pack", 0.16),
    ("stoves", "stove", 0.12),
    ("apparel", "jacket", 0.10),
    ("navigation", "compass", 0.06),
];

/// What to generate.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct SampleSpec {
    /// Requests to write.
    pub requests: usize,
    /// Candidates per request.
    pub candidates: usize,
    /// Embedding dimension.
    pub dim: usize,
    /// Seed.
    pub seed: u64,
    /// Add `"clicked"` held-out positives.
    pub with_clicks: bool,
    /// Send embeddings as `embedding_b64` instead of JSON arrays.
    pub b64: bool,
    /// Add each user's taste `"profile"` (category shares), for `calibrated` and miscalibration.
    pub with_profiles: bool,
    /// Add each candidate's maker `"group"` and a fairness floor for the independent makers,
    /// whom the ranking model under-scores (see [`INDEPENDENT`]).
    pub with_groups: bool,
}

/// The protected group of `--with-groups`: small independent makers, one item in five. The
/// ranking model under-scores them (their score's logit is lowered by 0.8), a
/// popularity bias their true appeal does not share, so the clicks do not follow it.
pub const INDEPENDENT: &str = "independent";

/// The other makers' group.
pub const MAINLINE: &str = "mainline";

/// How much the ranking model lowers an independent item's score logit.
const INDEPENDENT_BIAS: f64 = 0.8;

/// The fairness floor every request of `--with-groups` carries: the shop's promise of a 30 %
/// share to independent makers (above their 1 in 5 of the catalogue), each prefix tested at
/// alpha 0.1 (Zehlike et al. 2017); a slate of 10 must then hold at least one.
const FLOOR_SHARE: f64 = 0.3;
const FLOOR_ALPHA: f64 = 0.1;

/// SplitMix64 with Box–Muller normals.
#[derive(Debug, Clone)]
struct Rng {
    state: u64,
    spare: Option<f64>,
}

impl Rng {
    fn new(seed: u64) -> Self {
        Self { state: seed, spare: None }
    }

    fn next_u64(&mut self) -> u64 {
        self.state = self.state.wrapping_add(0x9e37_79b9_7f4a_7c15);
        crate::serve::config::mix64(self.state)
    }

    /// Uniform in (0, 1).
    fn unit(&mut self) -> f64 {
        ((self.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }

    fn normal(&mut self) -> f64 {
        if let Some(z) = self.spare.take() {
            return z;
        }
        let (u, v) = (self.unit(), self.unit());
        let r = (-2.0 * u.ln()).sqrt();
        let t = std::f64::consts::TAU * v;
        self.spare = Some(r * t.sin());
        r * t.cos()
    }

    fn below(&mut self, n: usize) -> usize {
        (self.next_u64() % n as u64) as usize
    }

    /// An index drawn with probability proportional to `weights`.
    fn weighted(&mut self, weights: &[f64]) -> usize {
        let total: f64 = weights.iter().sum();
        let mut x = self.unit() * total;
        for (i, &w) in weights.iter().enumerate() {
            if x < w {
                return i;
            }
            x -= w;
        }
        weights.len() - 1
    }
}

fn normalise(v: &mut [f64]) {
    let n = v.iter().map(|x| x * x).sum::<f64>().sqrt();
    if n > 0.0 {
        v.iter_mut().for_each(|x| *x /= n);
    }
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// Writes `spec.requests` JSONL requests to `out`.
///
/// # Errors
/// Only I/O errors on `out`.
pub fn write(spec: &SampleSpec, out: &mut dyn Write) -> std::io::Result<()> {
    emit(spec, out, None)
}

/// Writes the shop's items to `catalog` as an item catalog (Parquet: `id` utf8, `embedding`
/// fixed-size list of float32, `category` utf8), then `spec.requests` requests to `out` that
/// carry ids and scores only (no embeddings, no categories), for a server or `medley rerank` that
/// serves with that catalog. The requests are otherwise those [`write()`] writes for the same spec.
///
/// # Errors
/// I/O errors on `out` or the catalog file.
pub fn write_with_catalog(
    spec: &SampleSpec,
    catalog: &std::path::Path,
    out: &mut dyn Write,
) -> std::io::Result<()> {
    emit(spec, out, Some(catalog))
}

fn emit(spec: &SampleSpec, out: &mut dyn Write, catalog: Option<&std::path::Path>) -> std::io::Result<()> {
    let mut rng = Rng::new(spec.seed);
    let d = spec.dim.max(1);
    let centroids: Vec<Vec<f64>> = (0..CATEGORIES.len())
        .map(|_| {
            let mut c: Vec<f64> = (0..d).map(|_| rng.normal()).collect();
            normalise(&mut c);
            c
        })
        .collect();
    let popularity: Vec<f64> = CATEGORIES.iter().map(|c| c.2).collect();
    let catalogue = Catalogue::new(spec, &centroids, &popularity, &mut rng);
    if let Some(path) = catalog {
        catalogue.write_parquet(path)?;
    }
    for r in 0..spec.requests {
        let line = request(spec, r, &centroids, &popularity, &catalogue, &mut rng, catalog.is_some());
        serde_json::to_writer(&mut *out, &line)?;
        out.write_all(b"\n")?;
    }
    out.flush()
}

/// The shop's items: requests draw their candidates from it, so items recur across requests and
/// coverage and exposure mean something. Five times the candidates per request, at least 1 000.
struct Catalogue {
    category: Vec<usize>,
    embedding: Vec<Vec<f64>>,
    id: Vec<String>,
    /// Draw weight: the category's popularity times a Zipf-like rank factor within it.
    weight: Vec<f64>,
    /// Whether the item comes from an independent maker: one in five, by a hash of the seed and
    /// the item's position (no draw from the stream, so corpora without groups are unchanged).
    independent: Vec<bool>,
}

impl Catalogue {
    fn new(spec: &SampleSpec, centroids: &[Vec<f64>], popularity: &[f64], rng: &mut Rng) -> Self {
        let d = centroids[0].len();
        let size = (5 * spec.candidates).max(1000);
        let mut cat = Self {
            category: Vec::new(),
            embedding: Vec::new(),
            id: Vec::new(),
            weight: Vec::new(),
            independent: Vec::new(),
        };
        let mut per_category = vec![0_usize; CATEGORIES.len()];
        for _ in 0..size {
            let c = rng.weighted(popularity);
            per_category[c] += 1;
            let mut e: Vec<f64> =
                (0..d).map(|t| centroids[c][t] + 0.6 * rng.normal() / (d as f64).sqrt()).collect();
            normalise(&mut e);
            cat.id.push(format!("{}-{:04}", CATEGORIES[c].1, per_category[c]));
            cat.weight.push(popularity[c] / (per_category[c] as f64).sqrt());
            cat.category.push(c);
            cat.embedding.push(e);
            let item = cat.independent.len() as u64;
            cat.independent.push(
                crate::serve::config::mix64(spec.seed ^ item.wrapping_mul(0x9e37_79b9)).is_multiple_of(5),
            );
        }
        cat
    }

    /// The items as an item catalog in Parquet (snappy).
    fn write_parquet(&self, path: &std::path::Path) -> std::io::Result<()> {
        let d = self.embedding.first().map_or(1, Vec::len);
        let rows = self.embedding.iter().flatten().map(|&x| x as f32).collect();
        let categories = self.category.iter().map(|&c| CATEGORIES[c].0);
        crate::serve::catalog::write_parquet(path, &self.id, rows, d, categories)
    }
}

fn request(
    spec: &SampleSpec,
    r: usize,
    centroids: &[Vec<f64>],
    popularity: &[f64],
    catalogue: &Catalogue,
    rng: &mut Rng,
    ids_only: bool,
) -> Value {
    let d = centroids[0].len();
    // The user: a favourite category, a second interest, and some idiosyncrasy.
    let user = rng.below(10_000);
    let favourite = rng.weighted(popularity);
    let second = (favourite + 1 + rng.below(CATEGORIES.len() - 1)) % CATEGORIES.len();
    let mut taste: Vec<f64> = (0..d)
        .map(|t| {
            0.8 * centroids[favourite][t]
                + 0.45 * centroids[second][t]
                + 0.35 * rng.normal() / (d as f64).sqrt()
        })
        .collect();
    normalise(&mut taste);

    let mut candidates = Vec::with_capacity(spec.candidates);
    let mut affinity = Vec::with_capacity(spec.candidates);
    // Distinct catalogue items, drawn by weight (rejection on repeats; the catalogue is at least
    // five times larger than a request, so few draws repeat).
    let mut chosen = std::collections::HashSet::with_capacity(spec.candidates);
    let mut picks = Vec::with_capacity(spec.candidates);
    while picks.len() < spec.candidates.min(catalogue.id.len()) {
        let item = rng.weighted(&catalogue.weight);
        if chosen.insert(item) {
            picks.push(item);
        }
    }
    for item in picks {
        let cat = catalogue.category[item];
        let e = &catalogue.embedding[item];
        let true_affinity = dot(&taste, e);
        // The ranking model's score: the affinity seen through noise, squashed to (0, 1); with
        // groups, independent makers are under-scored.
        let independent = catalogue.independent[item];
        let bias = if spec.with_groups && independent { INDEPENDENT_BIAS } else { 0.0 };
        let score = 1.0 / (1.0 + (-(4.0 * true_affinity - bias + 0.6 * rng.normal())).exp());
        let (name, _, _) = CATEGORIES[cat];
        let id = catalogue.id[item].clone();
        let embedding: Vec<f32> = e.iter().map(|&x| x as f32).collect();
        let mut c = json!({"id": id, "score": (score * 1e6).round() / 1e6});
        if ids_only {
            // The catalog has the embedding and the category.
        } else if spec.b64 {
            c["category"] = json!(name);
            c["embedding_b64"] = json!(crate::api::wire::encode_b64_embedding(&embedding));
        } else {
            c["category"] = json!(name);
            c["embedding"] = json!(embedding);
        }
        if spec.with_groups {
            c["group"] = json!(if independent { INDEPENDENT } else { MAINLINE });
        }
        candidates.push(c);
        // What the user would actually pick: affinity with its own noise, plus an appetite for
        // the second interest that the score does not see.
        let appetite = if cat == second { 0.35 } else { 0.0 };
        affinity.push(true_affinity + appetite + 0.25 * rng.normal());
    }
    let mut request = json!({
        "request_id": format!("req-{r:06}"),
        "unit_id": format!("user-{user:04}"),
        "candidates": candidates,
    });
    if spec.with_profiles {
        // The user's taste mix over categories, as a profile learnt from their history would
        // give it: shares proportional to exp(3 · affinity to each category's centroid).
        let raw: Vec<f64> = centroids.iter().map(|c| (3.0 * dot(&taste, c)).exp()).collect();
        let total: f64 = raw.iter().sum();
        let profile: serde_json::Map<String, Value> = CATEGORIES
            .iter()
            .zip(&raw)
            .map(|((name, _, _), w)| ((*name).to_owned(), json!((w / total * 1e4).round() / 1e4)))
            .collect();
        request["profile"] = Value::Object(profile);
    }
    if spec.with_groups {
        request["fairness"] = json!({"protected": INDEPENDENT, "share": FLOOR_SHARE, "alpha": FLOOR_ALPHA});
    }
    if spec.with_clicks && spec.candidates > 0 {
        // 1 to 3 positives, drawn in proportion to exp(5 · affinity), without replacement.
        let clicks = 1 + rng.below(3.min(spec.candidates));
        let mut weights: Vec<f64> = affinity.iter().map(|a| (5.0 * a).exp()).collect();
        let mut clicked = Vec::with_capacity(clicks);
        for _ in 0..clicks {
            let i = rng.weighted(&weights);
            weights[i] = 0.0;
            clicked.push(request["candidates"][i]["id"].clone());
        }
        request["clicked"] = Value::Array(clicked);
    }
    request
}

#[cfg(test)]
mod tests {
    use super::*;

    fn corpus(spec: &SampleSpec) -> Vec<u8> {
        let mut out = Vec::new();
        write(spec, &mut out).unwrap();
        out
    }

    #[test]
    fn same_seed_same_bytes_and_valid_requests() {
        let spec = SampleSpec {
            requests: 20,
            candidates: 50,
            dim: 16,
            seed: 7,
            with_clicks: true,
            ..SampleSpec::default()
        };
        let a = corpus(&spec);
        assert_eq!(a, corpus(&spec));
        assert_ne!(a, corpus(&SampleSpec { seed: 8, ..spec }));
        let engine = crate::serve::engine::Engine::new(crate::serve::config::Config::embedded_default(), 1);
        for line in a.split(|&b| b == b'\n').filter(|l| !l.is_empty()) {
            let v: Value = serde_json::from_slice(line).unwrap();
            let ids: Vec<&str> =
                v["candidates"].as_array().unwrap().iter().map(|c| c["id"].as_str().unwrap()).collect();
            let clicked = v["clicked"].as_array().unwrap();
            assert!((1..=3).contains(&clicked.len()));
            assert!(clicked.iter().all(|c| ids.contains(&c.as_str().unwrap())));
            let request = crate::api::wire::decode_request(line).unwrap();
            engine.prepare(request).unwrap();
            assert!(
                v.get("profile").is_none()
                    && v.get("fairness").is_none()
                    && v["candidates"][0].get("group").is_none()
            );
        }
        // The extras are added without disturbing the stream: scores of mainline items, ids and
        // clicks stay the same, and the engine accepts the new fields.
        let extra = corpus(&SampleSpec { with_profiles: true, with_groups: true, ..spec });
        for (plain, rich) in
            a.split(|&b| b == b'\n').zip(extra.split(|&b| b == b'\n')).filter(|(l, _)| !l.is_empty())
        {
            let (p, r): (Value, Value) =
                (serde_json::from_slice(plain).unwrap(), serde_json::from_slice(rich).unwrap());
            assert_eq!(p["clicked"], r["clicked"]);
            for (pc, rc) in
                p["candidates"].as_array().unwrap().iter().zip(r["candidates"].as_array().unwrap())
            {
                assert_eq!(pc["id"], rc["id"]);
                if rc["group"] == MAINLINE {
                    assert_eq!(pc["score"], rc["score"]);
                } else {
                    assert_eq!(rc["group"], INDEPENDENT);
                    assert!(
                        rc["score"].as_f64() < pc["score"].as_f64(),
                        "independent makers are under-scored"
                    );
                }
            }
            engine.prepare(crate::api::wire::decode_request(rich).unwrap()).unwrap();
        }
    }
}
