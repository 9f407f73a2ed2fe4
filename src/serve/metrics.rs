//! `Metrics`: owns the Prometheus registry and every metric handle.
//!
//! Label values are only ever configured slice names, registry algorithm names and HTTP status
//! codes, never free text from a caller, so the number of series stays bounded by the config.
//! Duration buckets span 50 µs to 1 s: the kernels run from a few µs (relevance) to tens of ms
//! (DPP on 5 000 candidates), and the request deadline defaults to 1 s.

use prometheus::{
    Encoder, GaugeVec, HistogramOpts, HistogramVec, IntCounter, IntCounterVec, IntGauge, IntGaugeVec, Opts,
    Registry, TextEncoder,
};

/// Buckets of `medley_rerank_duration_seconds`, 50 µs to 1 s, about ×2 apart.
pub const DURATION_BUCKETS: &[f64] =
    &[0.00005, 0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0];

/// Buckets of the category-entropy histogram, in bits: log2 of 1..=1000 categories spans 0–10.
pub const ENTROPY_BUCKETS: &[f64] = &[0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0, 5.0, 6.0, 8.0, 10.0];

/// Buckets of candidates per request, up to the default 10 000 limit.
pub const CANDIDATE_BUCKETS: &[f64] =
    &[0.0, 10.0, 25.0, 50.0, 100.0, 200.0, 500.0, 1000.0, 2000.0, 5000.0, 10000.0];

/// Every metric the service exports.
#[derive(Debug, Clone)]
pub struct Metrics {
    registry: Registry,
    /// `medley_requests_total{status}`: every HTTP answer, by status code.
    pub requests: IntCounterVec,
    /// `medley_rerank_duration_seconds{slice, algorithm}`: from decoded body to built response.
    pub rerank_duration: HistogramVec,
    /// `medley_category_entropy{slice, algorithm}`: entropy of every served slate.
    pub entropy: HistogramVec,
    /// `medley_last_category_entropy{slice, algorithm}`: entropy of the latest slate.
    pub last_entropy: GaugeVec,
    /// `medley_fairness_shortfall_total{slice}`: slates whose fairness floor could not be met.
    pub fairness_shortfall: IntCounterVec,
    /// `medley_miscalibration{slice, arm, algorithm}`: KL of each profiled slate, nats.
    pub miscalibration: HistogramVec,
    /// `medley_last_intra_list_distance{slice, algorithm}`: ILD of the latest slate with embeddings.
    pub last_ild: GaugeVec,
    /// `medley_candidates_per_request{slice}`.
    pub candidates: HistogramVec,
    /// `medley_panics_total`: panics caught in handlers or kernels.
    pub panics: IntCounter,
    /// `medley_shed_total`: requests refused with 503 because `max_in_flight` were running.
    pub shed: IntCounter,
    /// `medley_body_budget_refused_total`: requests (or stream lines) refused with 503 because
    /// their body would pass `max_inflight_body_bytes`.
    pub body_budget_refused: IntCounter,
    /// `medley_inflight_body_bytes`: request body bytes reserved now (set at scrape time).
    pub inflight_body_bytes: IntGauge,
    /// `medley_in_flight_requests`: requests holding a concurrency permit.
    pub in_flight: IntGauge,
    /// `medley_config_generation`: generation of the config being served.
    pub config_generation: IntGauge,
    /// `medley_config_info{digest}`: 1 for the digest of the config being served (one series).
    pub config_info: IntGaugeVec,
    /// `medley_stream_lines_total{outcome}`: stream and batch lines, `ok` or `error`.
    pub stream_lines: IntCounterVec,
    /// `medley_grpc_requests_total{code}`: gRPC requests (and stream messages) answered, by
    /// gRPC status code name (`OK`, `INVALID_ARGUMENT`, ...).
    pub grpc_requests: IntCounterVec,
    /// `medley_pool_threads`: kernel pool size.
    pub pool_threads: IntGauge,
    /// `medley_config_reloads_total{trigger}`: successful swaps, by what asked for them.
    pub config_reloads: IntCounterVec,
    /// `medley_config_reload_failures_total{trigger}`: refused configs (the old one kept serving).
    pub config_reload_failures: IntCounterVec,
    /// `medley_config_reload_unchanged_total{trigger}`: reloads that validated to the config
    /// already serving (same digest), so nothing was swapped.
    pub config_reload_unchanged: IntCounterVec,
    /// `medley_catalog_reloads_total{trigger}`: item catalogs swapped in, by trigger.
    pub catalog_reloads: IntCounterVec,
    /// `medley_catalog_reload_failures_total{trigger}`: refused catalogs (the old one kept serving).
    pub catalog_reload_failures: IntCounterVec,
    /// `medley_catalog_info{version}`: 1 for the version of the catalog being served (one series;
    /// none without a catalog).
    pub catalog_info: IntGaugeVec,
    /// `medley_catalog_items`: items in the catalog being served (0 without one).
    pub catalog_items: IntGauge,
    /// `medley_unknown_items_total{slice}`: candidates dropped because the catalog lacks them.
    pub unknown_items: IntCounterVec,
    /// `medley_exposure_log_records_total`: exposure records written.
    pub exposure_records: IntCounter,
    /// `medley_exposure_log_dropped_total`: exposure records dropped because the queue was full.
    pub exposure_dropped: IntCounter,
    /// `medley_exposure_log_write_errors_total`: exposure records lost to a write error.
    pub exposure_write_errors: IntCounter,
    /// `medley_shadow_runs_total{slice}`.
    pub shadow_runs: IntCounterVec,
    /// `medley_shadow_dropped_total{slice}`: shadow jobs dropped because the queue was full.
    pub shadow_dropped: IntCounterVec,
    /// `medley_shadow_duration_seconds{slice, algorithm}`.
    pub shadow_duration: HistogramVec,
    /// `medley_shadow_overlap{slice}`.
    pub shadow_overlap: HistogramVec,
    /// `medley_shadow_rbo{slice}`.
    pub shadow_rbo: HistogramVec,
    /// `medley_shadow_entropy_delta{slice}`.
    pub shadow_entropy_delta: HistogramVec,
    /// `medley_shadow_ild_delta{slice}`.
    pub shadow_ild_delta: HistogramVec,
    /// `medley_shadow_relevance_retained{slice}`.
    pub shadow_relevance_retained: HistogramVec,
}

/// Buckets for shares in [0, 1] (overlap, RBO).
pub const SHARE_BUCKETS: &[f64] = &[0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.99, 1.0];
/// Buckets for signed differences (entropy in bits, ILD).
pub const DELTA_BUCKETS: &[f64] =
    &[-2.0, -1.0, -0.5, -0.25, -0.1, -0.01, 0.0, 0.01, 0.1, 0.25, 0.5, 1.0, 2.0];
/// Buckets for relevance retained.
pub const RETAINED_BUCKETS: &[f64] = &[0.5, 0.7, 0.8, 0.9, 0.95, 0.98, 0.99, 1.0, 1.01, 1.05, 1.2];

fn must<T>(r: prometheus::Result<T>) -> T {
    // Metric definitions are constants; a failure is a programming error caught by the tests.
    r.expect("metric definitions are valid and unique")
}

impl Metrics {
    /// Creates and registers every metric.
    ///
    /// # Panics
    /// Never for these constant definitions (a unit test registers them all).
    #[must_use]
    pub fn new() -> Self {
        let registry = Registry::new();
        let reg = |c: Box<dyn prometheus::core::Collector>| must(registry.register(c));
        let requests = must(IntCounterVec::new(
            Opts::new("medley_requests_total", "HTTP requests answered, by status code."),
            &["status"],
        ));
        let rerank_duration = must(HistogramVec::new(
            HistogramOpts::new(
                "medley_rerank_duration_seconds",
                "Time to serve one slate, from decoded body to built response.",
            )
            .buckets(DURATION_BUCKETS.to_vec()),
            &["slice", "arm", "algorithm"],
        ));
        let entropy = must(HistogramVec::new(
            HistogramOpts::new(
                "medley_category_entropy",
                "Shannon entropy (base 2) of the categories of each served slate.",
            )
            .buckets(ENTROPY_BUCKETS.to_vec()),
            &["slice", "arm", "algorithm"],
        ));
        let miscalibration = must(HistogramVec::new(
            HistogramOpts::new(
                "medley_miscalibration",
                "KL divergence (nats) of each served slate's categories from its request's profile (Steck 2018); slates with a profile only.",
            )
            .buckets(vec![0.01, 0.03, 0.1, 0.3, 1.0, 2.0, 3.0, 4.7]),
            &["slice", "arm", "algorithm"],
        ));
        let last_entropy = must(GaugeVec::new(
            Opts::new(
                "medley_last_category_entropy",
                "Shannon entropy (base 2) of the categories of the latest served slate.",
            ),
            &["slice", "arm", "algorithm"],
        ));
        let last_ild = must(GaugeVec::new(
            Opts::new("medley_last_intra_list_distance", "Intra-list distance (mean pairwise cosine distance) of the latest served slate that had embeddings."),
            &["slice", "arm", "algorithm"],
        ));
        let candidates = must(HistogramVec::new(
            HistogramOpts::new("medley_candidates_per_request", "Candidates sent per re-rank request.")
                .buckets(CANDIDATE_BUCKETS.to_vec()),
            &["slice"],
        ));
        let panics = must(IntCounter::new("medley_panics_total", "Panics caught and answered with 500."));
        let exposure_records =
            must(IntCounter::new("medley_exposure_log_records_total", "Exposure log records written."));
        let exposure_dropped = must(IntCounter::new(
            "medley_exposure_log_dropped_total",
            "Exposure log records dropped because the writer's queue was full (records or bytes).",
        ));
        let exposure_write_errors = must(IntCounter::new(
            "medley_exposure_log_write_errors_total",
            "Exposure log records lost because writing them failed (e.g. a full disk).",
        ));
        let shed = must(IntCounter::new(
            "medley_shed_total",
            "Requests refused with 503 because the concurrency limit was reached.",
        ));
        let body_budget_refused = must(IntCounter::new(
            "medley_body_budget_refused_total",
            "Requests and stream lines refused with 503 because their body would pass max_inflight_body_bytes.",
        ));
        let inflight_body_bytes = must(IntGauge::new(
            "medley_inflight_body_bytes",
            "Request body bytes reserved against max_inflight_body_bytes.",
        ));
        let in_flight = must(IntGauge::new("medley_in_flight_requests", "Requests being processed."));
        let config_generation =
            must(IntGauge::new("medley_config_generation", "Generation of the configuration being served."));
        let config_info = must(IntGaugeVec::new(
            Opts::new(
                "medley_config_info",
                "1 for the digest of the configuration being served (FNV-1a 64 of the validated config); equal across replicas that serve the same config.",
            ),
            &["digest"],
        ));
        let stream_lines = must(IntCounterVec::new(
            Opts::new(
                "medley_stream_lines_total",
                "Lines answered on the NDJSON stream endpoint, by outcome.",
            ),
            &["outcome"],
        ));
        let grpc_requests = must(IntCounterVec::new(
            Opts::new(
                "medley_grpc_requests_total",
                "gRPC requests and stream messages answered, by status code.",
            ),
            &["code"],
        ));
        let pool_threads = must(IntGauge::new("medley_pool_threads", "Threads in the kernel pool."));
        let counter =
            |name: &str, help: &str, label: &str| must(IntCounterVec::new(Opts::new(name, help), &[label]));
        let config_reloads =
            counter("medley_config_reloads_total", "Configurations swapped in, by trigger.", "trigger");
        let config_reload_failures = counter(
            "medley_config_reload_failures_total",
            "Configurations refused (the previous one kept serving), by trigger.",
            "trigger",
        );
        let config_reload_unchanged = counter(
            "medley_config_reload_unchanged_total",
            "Reloads that found the configuration already serving (nothing swapped), by trigger.",
            "trigger",
        );
        let catalog_reloads =
            counter("medley_catalog_reloads_total", "Item catalogs swapped in, by trigger.", "trigger");
        let catalog_reload_failures = counter(
            "medley_catalog_reload_failures_total",
            "Item catalogs refused (the previous one kept serving), by trigger.",
            "trigger",
        );
        let catalog_info = must(IntGaugeVec::new(
            Opts::new(
                "medley_catalog_info",
                "1 for the version (rows and FNV-1a 64 of the file) of the item catalog being served.",
            ),
            &["version"],
        ));
        let catalog_items =
            must(IntGauge::new("medley_catalog_items", "Items in the catalog being served (0 without one)."));
        let unknown_items = counter(
            "medley_unknown_items_total",
            "Candidates left out because the item catalog lacks them (unknown_items = \"drop\"), by slice.",
            "slice",
        );
        let fairness_shortfall = counter(
            "medley_fairness_shortfall_total",
            "Served slates whose fairness floor could not be met (too few protected candidates).",
            "slice",
        );
        let shadow_runs = counter("medley_shadow_runs_total", "Shadow runs completed.", "slice");
        let shadow_dropped = counter(
            "medley_shadow_dropped_total",
            "Shadow runs dropped because the shadow queue was full.",
            "slice",
        );
        let hist = |name: &str, help: &str, buckets: &[f64], labels: &[&str]| {
            must(HistogramVec::new(HistogramOpts::new(name, help).buckets(buckets.to_vec()), labels))
        };
        let shadow_duration = hist(
            "medley_shadow_duration_seconds",
            "Time of one shadow run, off the request path.",
            DURATION_BUCKETS,
            &["slice", "algorithm"],
        );
        let shadow_overlap = hist(
            "medley_shadow_overlap",
            "Share of items the shadow and primary slates share.",
            SHARE_BUCKETS,
            &["slice"],
        );
        let shadow_rbo = hist(
            "medley_shadow_rbo",
            "Rank-biased overlap (p = 0.9, extrapolated) of shadow and primary slates.",
            SHARE_BUCKETS,
            &["slice"],
        );
        let shadow_entropy_delta = hist(
            "medley_shadow_entropy_delta",
            "Category entropy (base 2) of the shadow slate minus the primary's.",
            DELTA_BUCKETS,
            &["slice"],
        );
        let shadow_ild_delta = hist(
            "medley_shadow_ild_delta",
            "Intra-list distance of the shadow slate minus the primary's.",
            DELTA_BUCKETS,
            &["slice"],
        );
        let shadow_relevance_retained = hist(
            "medley_shadow_relevance_retained",
            "Sum of normalised scores of the shadow slate over the primary's.",
            RETAINED_BUCKETS,
            &["slice"],
        );
        reg(Box::new(requests.clone()));
        reg(Box::new(rerank_duration.clone()));
        reg(Box::new(entropy.clone()));
        reg(Box::new(last_entropy.clone()));
        reg(Box::new(last_ild.clone()));
        reg(Box::new(miscalibration.clone()));
        reg(Box::new(candidates.clone()));
        reg(Box::new(panics.clone()));
        reg(Box::new(shed.clone()));
        reg(Box::new(body_budget_refused.clone()));
        reg(Box::new(inflight_body_bytes.clone()));
        reg(Box::new(in_flight.clone()));
        reg(Box::new(config_generation.clone()));
        reg(Box::new(config_info.clone()));
        reg(Box::new(stream_lines.clone()));
        reg(Box::new(grpc_requests.clone()));
        reg(Box::new(pool_threads.clone()));
        reg(Box::new(config_reloads.clone()));
        reg(Box::new(config_reload_failures.clone()));
        reg(Box::new(config_reload_unchanged.clone()));
        reg(Box::new(catalog_reloads.clone()));
        reg(Box::new(catalog_reload_failures.clone()));
        reg(Box::new(catalog_info.clone()));
        reg(Box::new(catalog_items.clone()));
        reg(Box::new(unknown_items.clone()));
        reg(Box::new(fairness_shortfall.clone()));
        reg(Box::new(exposure_records.clone()));
        reg(Box::new(exposure_dropped.clone()));
        reg(Box::new(exposure_write_errors.clone()));
        reg(Box::new(shadow_runs.clone()));
        reg(Box::new(shadow_dropped.clone()));
        reg(Box::new(shadow_duration.clone()));
        reg(Box::new(shadow_overlap.clone()));
        reg(Box::new(shadow_rbo.clone()));
        reg(Box::new(shadow_entropy_delta.clone()));
        reg(Box::new(shadow_ild_delta.clone()));
        reg(Box::new(shadow_relevance_retained.clone()));
        Self {
            registry,
            requests,
            rerank_duration,
            entropy,
            last_entropy,
            last_ild,
            miscalibration,
            candidates,
            panics,
            shed,
            body_budget_refused,
            inflight_body_bytes,
            in_flight,
            config_generation,
            config_info,
            stream_lines,
            grpc_requests,
            pool_threads,
            config_reloads,
            config_reload_failures,
            config_reload_unchanged,
            catalog_reloads,
            catalog_reload_failures,
            catalog_info,
            catalog_items,
            unknown_items,
            fairness_shortfall,
            exposure_records,
            exposure_dropped,
            exposure_write_errors,
            shadow_runs,
            shadow_dropped,
            shadow_duration,
            shadow_overlap,
            shadow_rbo,
            shadow_entropy_delta,
            shadow_ild_delta,
            shadow_relevance_retained,
        }
    }

    /// Records one shadow comparison.
    pub fn observe_shadow(
        &self,
        slice: &str,
        algorithm: &str,
        seconds: f64,
        c: &medley_core::measures::Comparison,
    ) {
        self.shadow_runs.with_label_values(&[slice]).inc();
        self.shadow_duration.with_label_values(&[slice, algorithm]).observe(seconds);
        self.shadow_overlap.with_label_values(&[slice]).observe(c.overlap);
        self.shadow_rbo.with_label_values(&[slice]).observe(c.rbo);
        self.shadow_entropy_delta.with_label_values(&[slice]).observe(c.entropy_delta);
        if let Some(d) = c.ild_delta {
            self.shadow_ild_delta.with_label_values(&[slice]).observe(d);
        }
        if let Some(r) = c.relevance_retained {
            self.shadow_relevance_retained.with_label_values(&[slice]).observe(r);
        }
    }

    /// Records one served slate.
    #[allow(clippy::too_many_arguments)]
    pub fn observe_slate(
        &self,
        slice: &str,
        arm: &str,
        algorithm: &str,
        seconds: f64,
        n: usize,
        entropy: f64,
        ild: Option<f64>,
        miscalibration: Option<f64>,
    ) {
        let labels = [slice, arm, algorithm];
        self.rerank_duration.with_label_values(&labels).observe(seconds);
        self.entropy.with_label_values(&labels).observe(entropy);
        self.last_entropy.with_label_values(&labels).set(entropy);
        if let Some(ild) = ild {
            self.last_ild.with_label_values(&labels).set(ild);
        }
        self.candidates.with_label_values(&[slice]).observe(n as f64);
        if let Some(kl) = miscalibration {
            self.miscalibration.with_label_values(&labels).observe(kl);
        }
    }

    /// Records the config now served: its generation, and its digest as the one
    /// `medley_config_info` series.
    pub fn set_config(&self, generation: u64, digest: &str) {
        self.config_generation.set(i64::try_from(generation).unwrap_or(i64::MAX));
        self.config_info.reset();
        self.config_info.with_label_values(&[digest]).set(1);
    }

    /// Records the catalog now served (`None`: no catalog).
    pub fn set_catalog(&self, catalog: Option<&crate::serve::catalog::Catalog>) {
        self.catalog_info.reset();
        if let Some(c) = catalog {
            self.catalog_info.with_label_values(&[c.version()]).set(1);
        }
        self.catalog_items.set(catalog.map_or(0, |c| i64::try_from(c.len()).unwrap_or(i64::MAX)));
    }

    /// The Prometheus text exposition (format 0.0.4).
    #[must_use]
    pub fn render(&self) -> Vec<u8> {
        let mut out = Vec::with_capacity(16 << 10);
        // Encoding into a Vec cannot fail for well-formed families.
        let _ = TextEncoder::new().encode(&self.registry.gather(), &mut out);
        out
    }
}

impl Default for Metrics {
    fn default() -> Self {
        Self::new()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn renders_every_family_after_one_slate() {
        let m = Metrics::new();
        m.requests.with_label_values(&["200"]).inc();
        m.observe_slate("default", "default", "dpp", 0.0004, 500, 1.5, Some(0.4), Some(0.2));
        let text = String::from_utf8(m.render()).unwrap();
        for name in [
            "medley_requests_total{status=\"200\"} 1",
            "medley_rerank_duration_seconds_bucket{algorithm=\"dpp\",arm=\"default\",slice=\"default\",le=\"0.0005\"} 1",
            "medley_category_entropy_sum{algorithm=\"dpp\",arm=\"default\",slice=\"default\"} 1.5",
            "medley_last_category_entropy{algorithm=\"dpp\",arm=\"default\",slice=\"default\"} 1.5",
            "medley_last_intra_list_distance{algorithm=\"dpp\",arm=\"default\",slice=\"default\"} 0.4",
            "medley_candidates_per_request_count{slice=\"default\"} 1",
            "medley_panics_total 0",
        ] {
            assert!(text.contains(name), "missing {name} in\n{text}");
        }
    }
}
