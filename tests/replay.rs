//! `medley replay` on a corpus from `medley sample --with-clicks`: lambda = 0 reproduces the
//! relevance baseline exactly, raising lambda raises diversity (the accuracy–diversity trade-off
//! is a fact of the trade; checking its direction is common practice, not a proof), and the
//! outputs are a complete CSV and well-formed SVG.

use std::process::Command;

use serde_json::{json, Value};

use medley::diversify::by_name;
use medley::offline::replay::{evaluate_lines, Cell, GridOptions, Point};
use medley::offline::sample::{write, SampleSpec};
use medley::serve::config::Config;
use medley::serve::engine::Engine;

/// One cell over the lines: (baseline, cell).
fn evaluate(
    lines: &[u8],
    algorithm: &'static dyn medley::Diversifier,
    lambda: f64,
    k: usize,
) -> (Point, Point) {
    let engine = Engine::new(Config::embedded_default(), 1);
    let (points, _) =
        evaluate_lines(&engine, lines, &[Cell { algorithm, window: None, lambda }], GridOptions::new(k))
            .unwrap();
    (points[0].clone(), points[1].clone())
}

fn corpus() -> Vec<u8> {
    let spec = SampleSpec {
        requests: 120,
        candidates: 80,
        dim: 16,
        seed: 11,
        with_clicks: true,
        ..SampleSpec::default()
    };
    let mut bytes = Vec::new();
    write(&spec, &mut bytes).unwrap();
    let engine = Engine::new(Config::embedded_default(), 1);
    let (_, stats) = evaluate_lines(&engine, &bytes, &[], GridOptions::new(10)).unwrap();
    assert_eq!((stats.slates, stats.invalid, stats.without_clicks), (120, 0, 0));
    bytes
}

#[test]
fn lambda_zero_is_the_baseline_and_lambda_buys_diversity() {
    let corpus = corpus();
    let (baseline, _) = evaluate(&corpus, by_name("relevance").unwrap(), 0.0, 10);
    for name in ["mmr", "dpp", "quota"] {
        let algorithm = by_name(name).unwrap();
        let at = |lambda: f64| evaluate(&corpus, algorithm, lambda, 10).1;
        let zero = at(0.0);
        for (a, b) in [
            (zero.recall, baseline.recall),
            (zero.ndcg, baseline.ndcg),
            (zero.entropy, baseline.entropy),
            (zero.ild, baseline.ild),
            (zero.coverage, baseline.coverage),
            (zero.gini, baseline.gini),
        ] {
            assert_eq!(a.to_bits(), b.to_bits(), "{name} at lambda 0 must equal the baseline exactly");
        }
        let (low, mid) = (at(0.25), at(0.5));
        assert!(
            zero.entropy < low.entropy && low.entropy < mid.entropy,
            "{name} entropy: {zero:?} {low:?} {mid:?}"
        );
        assert!(zero.ild < low.ild && low.ild < mid.ild, "{name} ILD: {zero:?} {low:?} {mid:?}");
        assert!(mid.relevance_retained < 1.0, "{name} trades some relevance");
    }
}

#[test]
fn the_binary_writes_a_complete_csv_and_well_formed_svg_and_picks() {
    let dir = std::env::temp_dir().join(format!("medley-replay-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let logged = dir.join("logged.jsonl");
    let bin = env!("CARGO_BIN_EXE_medley");
    let out = Command::new(bin)
        .args([
            "sample",
            "--requests",
            "80",
            "--candidates",
            "60",
            "--dim",
            "8",
            "--with-clicks",
            "--b64",
            "--output",
        ])
        .arg(&logged)
        .output()
        .unwrap();
    assert!(out.status.success());
    let out = Command::new(bin)
        .args([
            "replay",
            "--input",
            logged.to_str().unwrap(),
            "--lambdas",
            "0,0.5,1",
            "--out",
            dir.to_str().unwrap(),
        ])
        .args(["--pick", "ndcg>=0.5*baseline"])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let report = String::from_utf8(out.stdout).unwrap();
    assert!(report.contains("80 slates"), "{report}");
    assert!(report.contains("[slices.SLICE]"), "{report}");
    let csv = std::fs::read_to_string(dir.join("frontier.csv")).unwrap();
    let rows: Vec<&str> = csv.lines().collect();
    assert_eq!(rows[0], medley::offline::replay::CSV_HEADER);
    assert_eq!(rows.len(), 1 + 1 + 4 * 3, "header, baseline, 4 algorithms x 3 lambdas");
    assert!(rows[1].starts_with("baseline,0,"));
    let svg = std::fs::read_to_string(dir.join("frontier.svg")).unwrap();
    let doc = roxmltree::Document::parse(&svg).expect("frontier.svg is well-formed XML");
    assert_eq!(doc.root_element().tag_name().name(), "svg");
    let text: String = doc.descendants().filter(|n| n.is_text()).filter_map(|n| n.text()).collect();
    for label in ["relevance baseline", "dpp", "mmr", "quota", "λ=0.5", "nDCG@10", "entropy"] {
        assert!(text.contains(label), "the plot lacks {label:?}");
    }
}

/// Issue 17 in replay: `--windows` adds a line of cells per window to dpp and ssd (unbounded
/// kept), the CSV names the window, the pick prints it, and calibration replays logged
/// profiles, or says which lines lack one.
#[test]
fn windows_and_calibration_join_the_replay_grid() {
    let dir = std::env::temp_dir().join(format!("medley-replay-17-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let spec = SampleSpec {
        requests: 60,
        candidates: 40,
        dim: 8,
        seed: 5,
        with_clicks: true,
        b64: true,
        ..SampleSpec::default()
    };
    let mut bytes = Vec::new();
    write(&spec, &mut bytes).unwrap();
    let plain = dir.join("plain.jsonl");
    std::fs::write(&plain, &bytes).unwrap();
    // The same lines with a taste profile each.
    let profiled: String = String::from_utf8(bytes)
        .unwrap()
        .lines()
        .map(|l| {
            let mut v: serde_json::Value = serde_json::from_str(l).unwrap();
            v["profile"] = serde_json::json!({"tents": 3.0, "stoves": 1.0, "footwear": 2.0});
            format!("{v}\n")
        })
        .collect();
    let with_profiles = dir.join("profiled.jsonl");
    std::fs::write(&with_profiles, profiled).unwrap();
    let bin = env!("CARGO_BIN_EXE_medley");
    let replay = |input: &std::path::Path, algorithms: &str, extra: &[&str]| {
        Command::new(bin)
            .args([
                "replay",
                "--input",
                input.to_str().unwrap(),
                "--algorithms",
                algorithms,
                "--lambdas",
                "0,0.6",
            ])
            .args(["--out", dir.to_str().unwrap()])
            .args(extra)
            .output()
            .unwrap()
    };
    let out = replay(&plain, "dpp,ssd,mmr", &["--windows", "3,6", "--pick", "ndcg>=0.5*baseline"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let report = String::from_utf8(out.stdout).unwrap();
    assert!(report.contains("dpp w=3") && report.contains("ssd w=6"), "{report}");
    let csv = std::fs::read_to_string(dir.join("frontier.csv")).unwrap();
    let rows: Vec<&str> = csv.lines().collect();
    // Header, baseline, dpp and ssd in 3 window settings x 2 lambdas, mmr x 2 lambdas.
    assert_eq!(rows.len(), 2 + 2 * 3 * 2 + 2, "{csv}");
    assert!(rows.iter().any(|r| r.starts_with("dpp,0.6,3,")), "{csv}");
    assert!(rows.iter().any(|r| r.starts_with("ssd,0.6,,")), "{csv}");
    assert!(rows.iter().any(|r| r.starts_with("mmr,0.6,,")), "{csv}");

    let out = replay(&plain, "calibrated", &[]);
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("line 1 (counted over all input files) has none"));
    let out = replay(&with_profiles, "calibrated", &[]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert!(String::from_utf8(out.stdout).unwrap().contains("calibrated"));
    // The CSV's miscalibration column is filled when lines carry profiles, and calibration
    // lowers it as lambda rises.
    let csv = std::fs::read_to_string(dir.join("frontier.csv")).unwrap();
    let header: Vec<&str> = csv.lines().next().unwrap().split(',').collect();
    let col = header.iter().position(|h| *h == "miscalibration").unwrap();
    let kl: Vec<f64> = csv.lines().skip(1).map(|r| r.split(',').nth(col).unwrap().parse().unwrap()).collect();
    assert!(kl[2] < kl[1], "calibrated at lambda 0.6 is closer to the profile than at 0: {csv}");
}

/// Issue 17 in replay, on `medley sample --with-profiles --with-groups`: a logged line's
/// `profile` and `group` (and its fairness floor) are used. Calibration (Steck 2018) lowers the
/// slates' miscalibration as lambda rises; under the floor every slate holds m(k) independent
/// makers at least (Zehlike et al. 2017), where the raw score order, which under-scores them,
/// holds fewer on average. The direction checks are common practice, not proofs; m(k) comes
/// from `minimum_protected`, itself checked against scipy.stats.binom in the fixtures.
#[test]
fn profiles_and_groups_from_the_sample_drive_calibration_and_the_fairness_floor() {
    let spec = SampleSpec {
        requests: 80,
        candidates: 60,
        dim: 16,
        seed: 21,
        with_clicks: true,
        with_profiles: true,
        with_groups: true,
        ..SampleSpec::default()
    };
    let mut bytes = Vec::new();
    write(&spec, &mut bytes).unwrap();
    // Without the floor, the top 10 by score under-represent the independent makers (one item
    // in five in the catalogue).
    let mut top_share = 0.0;
    for line in String::from_utf8(bytes.clone()).unwrap().lines() {
        let v: serde_json::Value = serde_json::from_str(line).unwrap();
        let total: f64 = v["profile"].as_object().unwrap().values().map(|w| w.as_f64().unwrap()).sum();
        assert!((total - 1.0).abs() < 1e-3, "profile shares sum to 1: {total}");
        assert_eq!(v["fairness"]["protected"], "independent");
        let mut c: Vec<(f64, bool)> = v["candidates"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| (c["score"].as_f64().unwrap(), c["group"] == "independent"))
            .collect();
        c.sort_by(|a, b| b.0.total_cmp(&a.0));
        top_share += c[..10].iter().filter(|x| x.1).count() as f64 / 10.0 / 80.0;
    }
    let corpus = bytes;
    let calibrated = by_name("calibrated").unwrap();
    let (plain, calibrating) =
        (evaluate(&corpus, calibrated, 0.0, 10).1, evaluate(&corpus, calibrated, 0.8, 10).1);
    let (before, after) = (plain.miscalibration.unwrap(), calibrating.miscalibration.unwrap());
    assert!(after < 0.5 * before, "calibration lowers KL(p ‖ q̃): {before} -> {after}");

    let need = medley::fairness::minimum_protected(10, 0.3, 0.1)[9] as f64 / 10.0;
    assert!(need > 0.0 && top_share < need, "the score order under-represents them: {top_share} vs {need}");
    for name in ["relevance", "mmr", "dpp", "calibrated"] {
        let share = evaluate(&corpus, by_name(name).unwrap(), 0.5, 10).1.protected_share.unwrap();
        assert!(share >= need, "{name}: protected share {share} under the floor's {need}");
    }
}

/// Issue 18: the same lines as the exposure log (split over files, one zstd-compressed in two
/// frames by the `zstandard` Python package, one cut short by a crash) give the corpus's numbers;
/// shuffling the lines leaves the bootstrap intervals where they were (weights are keyed by
/// request id, Chamandy et al. 2012), and a partial last line is skipped and reported.
#[test]
fn exposure_logs_zstd_and_shuffled_lines_replay_alike() {
    let dir = std::env::temp_dir().join(format!("medley-replay-18-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(dir.join("log")).unwrap();
    let spec = SampleSpec {
        requests: 90,
        candidates: 40,
        dim: 8,
        seed: 9,
        with_clicks: true,
        ..SampleSpec::default()
    };
    let mut bytes = Vec::new();
    write(&spec, &mut bytes).unwrap();
    let text = String::from_utf8(bytes).unwrap();
    let corpus = dir.join("corpus.jsonl");
    std::fs::write(&corpus, &text).unwrap();
    // As the exposure log writes them: the request (without clicks) and what was served; the
    // clicks ride in the line here, as a join would put them.
    let exposure: Vec<String> = text
        .lines()
        .map(|l| {
            let mut v: Value = serde_json::from_str(l).unwrap();
            let clicked = v.as_object_mut().unwrap().remove("clicked").unwrap();
            let id = v["request_id"].clone();
            let served: Vec<Value> = v["candidates"].as_array().unwrap()[..10].iter().map(|c| c["id"].clone()).collect();
            format!(
                "{}\n",
                json!({"ts": "2026-12-01T00:00:00Z", "request": v, "served": {"request_id": id, "items": served}, "clicked": clicked})
            )
        })
        .collect();
    std::fs::write(dir.join("log/exposure-a-000001.jsonl"), exposure[..30].concat()).unwrap();
    let zst_source = dir.join("middle.jsonl");
    std::fs::write(&zst_source, exposure[30..60].concat()).unwrap();
    // The last file ends in a line cut short.
    let mut last = exposure[60..].concat();
    last.push_str(&exposure[0][..100]);
    std::fs::write(dir.join("log/exposure-c-000003.jsonl"), last).unwrap();
    let python = std::env::var("MEDLEY_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = "import sys, zstandard\n\
        data = open(sys.argv[1], 'rb').read()\n\
        half = data.index(b'\\n', len(data) // 2) + 1\n\
        c = zstandard.ZstdCompressor()\n\
        open(sys.argv[2], 'wb').write(c.compress(data[:half]) + c.compress(data[half:]))\n";
    let status = Command::new(&python)
        .args(["-c", script])
        .arg(&zst_source)
        .arg(dir.join("log/exposure-b-000002.jsonl.zst"))
        .status()
        .expect("MEDLEY_PYTHON (or python3) with the zstandard package");
    assert!(status.success(), "the zstandard package is needed: pip install zstandard");

    let bin = env!("CARGO_BIN_EXE_medley");
    let replay = |input: &std::path::Path, out: &str| {
        let out_dir = dir.join(out);
        let o = Command::new(bin)
            .args(["replay", "--input"])
            .arg(input)
            .args(["--algorithms", "dpp,mmr", "--lambdas", "0,0.5", "--out"])
            .arg(&out_dir)
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        (String::from_utf8(o.stdout).unwrap(), std::fs::read_to_string(out_dir.join("frontier.csv")).unwrap())
    };
    let (plain_report, plain_csv) = replay(&corpus, "plain");
    let (log_report, log_csv) = replay(&dir.join("log"), "log");
    assert!(log_report.contains("90 slates"), "{log_report}");
    assert!(
        log_report.contains("skipped a partial last line at")
            && log_report.contains("exposure-c-000003.jsonl:31"),
        "{log_report}"
    );
    assert!(!plain_report.contains("partial"), "{plain_report}");
    // Every column but ips_clicks (the corpus has no served slate) agrees to the printed digit.
    let header: Vec<&str> = plain_csv.lines().next().unwrap().split(',').collect();
    let ips = header.iter().position(|h| *h == "ips_clicks").unwrap();
    for (a, b) in plain_csv.lines().zip(log_csv.lines()).skip(1) {
        let (a, b): (Vec<&str>, Vec<&str>) = (a.split(',').collect(), b.split(',').collect());
        for (j, name) in header.iter().enumerate() {
            if j != ips {
                assert_eq!(a[j], b[j], "{name}");
            }
        }
        assert!(a[ips].is_empty() && !b[ips].is_empty());
    }

    // Shuffled (reversed, and the halves swapped): the same intervals to 1e-9.
    let mut lines: Vec<&str> = text.lines().collect();
    lines.reverse();
    lines.rotate_left(45);
    let shuffled = dir.join("shuffled.jsonl");
    std::fs::write(&shuffled, lines.iter().map(|l| format!("{l}\n")).collect::<String>()).unwrap();
    let (_, shuffled_csv) = replay(&shuffled, "shuffled");
    for (a, b) in plain_csv.lines().zip(shuffled_csv.lines()).skip(1) {
        for (x, y) in a.split(',').zip(b.split(',')).skip(3) {
            if let (Ok(x), Ok(y)) = (x.parse::<f64>(), y.parse::<f64>()) {
                assert!((x - y).abs() < 1e-6, "{a}\n{b}");
            }
        }
    }
}

/// Issue 18, `compress = true`: the exposure log's writer (the library's, as `medley serve` runs
/// it) writes `.jsonl.zst` files that the `zstandard` Python package decodes to whole lines, and
/// replay reads them with `--clicks`; a crash that cuts the last frame short loses only that
/// frame's records, which replay reports.
#[test]
fn compressed_exposure_logs_decode_with_zstandard_and_replay() {
    use medley::serve::exposure::{ExposureLog, LoggedRequest, Record, ServedRecord};
    let dir = std::env::temp_dir().join(format!("medley-replay-zst-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    let spec = SampleSpec {
        requests: 400,
        candidates: 30,
        dim: 8,
        seed: 4,
        with_clicks: true,
        ..SampleSpec::default()
    };
    let mut bytes = Vec::new();
    write(&spec, &mut bytes).unwrap();
    let settings = medley::serve::config::ExposureLogSettings {
        dir: dir.join("log"),
        sample_rate: 1.0,
        max_file_bytes: 200_000,
        queue: 10_000,
        queue_bytes: 1 << 30,
        compress: true,
    };
    let log =
        ExposureLog::start(&settings, std::sync::Arc::new(medley::serve::metrics::Metrics::new())).unwrap();
    let mut clicks = String::new();
    for line in String::from_utf8(bytes).unwrap().lines() {
        let mut v: Value = serde_json::from_str(line).unwrap();
        let clicked = v.as_object_mut().unwrap().remove("clicked").unwrap();
        let id = v["request_id"].as_str().unwrap().to_owned();
        let items = v["candidates"].as_array().unwrap()[..10]
            .iter()
            .map(|c| c["id"].as_str().unwrap().to_owned())
            .collect();
        clicks.push_str(&format!("{}\n", json!({"request_id": id, "clicked": clicked})));
        log.submit(Record {
            ts: chrono::Utc::now(),
            request: LoggedRequest::Json(serde_json::to_vec(&v).unwrap().into()),
            served: ServedRecord {
                request_id: id,
                slice: "default".into(),
                arm: "default".into(),
                algorithm: "relevance",
                lambda: 0.0,
                k: 10,
                config_generation: 1,
                config_digest: "0".into(),
                items,
                catalog_version: None,
            },
        });
    }
    log.stop();
    std::fs::write(dir.join("clicks.jsonl"), clicks).unwrap();
    let mut files: Vec<_> = std::fs::read_dir(dir.join("log")).unwrap().map(|e| e.unwrap().path()).collect();
    files.sort();
    assert!(files.len() >= 2, "{files:?}");
    // Every complete file decodes with the reference library into whole JSON lines.
    let python = std::env::var("MEDLEY_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = "import sys, json, zstandard\n\
        n = 0\n\
        for path in sys.argv[1:]:\n\
        \x20   raw = open(path, 'rb').read()\n\
        \x20   text = b''\n\
        \x20   while raw:\n\
        \x20       d = zstandard.ZstdDecompressor().decompressobj()\n\
        \x20       text += d.decompress(raw)\n\
        \x20       raw = d.unused_data\n\
        \x20   assert text.endswith(b'\\n')\n\
        \x20   n += sum(1 for l in text.splitlines() if json.loads(l)['served'])\n\
        print(n)\n";
    let out =
        Command::new(&python).args(["-c", script]).args(&files).output().expect("python with zstandard");
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert_eq!(String::from_utf8(out.stdout).unwrap().trim(), "400");
    // A crash mid-frame: the last file loses its tail. Crashes can also leave a file opened but
    // empty, or holding only the start of a frame header.
    let last = files.last().unwrap();
    let data = std::fs::read(last).unwrap();
    std::fs::write(last, &data[..data.len() - 200]).unwrap();
    std::fs::write(dir.join("log/exposure-zz-000098.jsonl.zst"), b"").unwrap();
    std::fs::write(dir.join("log/exposure-zz-000099.jsonl.zst"), &data[..3]).unwrap();
    let bin = env!("CARGO_BIN_EXE_medley");
    let o = Command::new(bin)
        .args(["replay", "--input"])
        .arg(dir.join("log"))
        .arg("--clicks")
        .arg(dir.join("clicks.jsonl"))
        .args(["--algorithms", "dpp", "--lambdas", "0,0.5", "--out"])
        .arg(dir.join("out"))
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let report = String::from_utf8(o.stdout).unwrap();
    assert!(report.contains("zstd stream cut short"), "{report}");
    assert!(report.contains("exposure-zz-000099.jsonl.zst:1 (zstd stream cut short"), "{report}");
    assert!(!report.contains("exposure-zz-000098"), "an empty file holds no lines: {report}");
    let slates: usize = report.split(" slates").next().unwrap().trim().parse().unwrap();
    assert!(slates > 200 && slates < 400, "{report}");
    // The served order was relevance: replaying it gives ips_clicks = clicks in the top 10.
    assert!(report.contains("ips_clicks"), "{report}");
}
