//! The plain-text summary `medley check-config` prints.

use super::validated::Config;

/// A plain-text summary of what `config` serves, for `medley check-config`.
#[must_use]
pub fn describe(config: &Config) -> String {
    use std::fmt::Write as _;
    let s = &config.server;
    let mut out = String::new();
    let _ = writeln!(out, "config ok");
    let grpc = s.grpc_listen.map_or_else(|| "off".to_owned(), |a| a.to_string());
    let _ = writeln!(out, "listen {} (public), {} (private), gRPC {grpc}", s.listen, s.admin_listen);
    let _ = writeln!(
        out,
        "limits: body {} bytes ({} in flight), {} candidates, dim {}, k {}; timeout {} ms; {} in flight; {} pool threads; \
         header/idle timeout {} ms, body timeout {} ms, {} connections",
        s.max_body_bytes,
        s.max_inflight_body_bytes,
        s.limits.max_candidates,
        s.limits.max_dim,
        s.limits.max_k,
        s.request_timeout.as_millis(),
        s.max_in_flight,
        s.pool_threads,
        s.header_timeout.as_millis(),
        s.body_timeout.as_millis(),
        s.max_connections
    );
    if let Some(log) = &config.exposure_log {
        let _ = writeln!(
            out,
            "exposure log: {} (sample_rate {}, files up to {} bytes{}, queue {} records / {} bytes)",
            log.dir.display(),
            log.sample_rate,
            log.max_file_bytes,
            if log.compress { ", zstd" } else { "" },
            log.queue,
            log.queue_bytes
        );
    }
    for slice in config.slices.values() {
        let _ = writeln!(out, "slice {}: locked={}", slice.name, slice.locked);
        for arm in &slice.arms {
            let st = &arm.settings;
            let cap = st.max_per_category.map_or_else(|| "none".to_owned(), |c| c.to_string());
            let share = 100.0 * arm.weight as f64 / slice.total_weight as f64;
            let _ = writeln!(
                out,
                "  arm {} ({share:.1} %): algorithm={} lambda={} k={} score_transform={} max_per_category={}{}{}",
                arm.name,
                st.algorithm.name(),
                st.lambda,
                st.k,
                st.score_transform.name(),
                cap,
                st.window.map_or_else(String::new, |w| format!(" window={w}")),
                match st.unknown_items {
                    super::UnknownItems::Refuse => String::new(),
                    other => format!(" unknown_items={}", other.name()),
                },
            );
        }
        if let Some(profile) = &slice.profile {
            let text: Vec<String> = profile.iter().map(|(c, w)| format!("{c}={w}")).collect();
            let _ = writeln!(out, "  profile: {}", text.join(" "));
        }
        if let Some(f) = &slice.fairness {
            let _ =
                writeln!(out, "  fairness: protected={} share={} alpha={}", f.protected, f.share, f.alpha);
        }
        if let Some(sh) = &slice.shadow {
            let _ = writeln!(
                out,
                "  shadow: algorithm={} lambda={} sample_rate={}",
                sh.algorithm.name(),
                sh.lambda,
                sh.sample_rate
            );
        }
    }
    out
}
