//! The Kubernetes manifests in config/k8s/ agree with the binary: they parse (yaml-rust2, a
//! general-purpose YAML 1.2 parser), the Deployment's args are a valid `medley serve` command
//! line, its ports are the binary's default ports, its probes and scrape path answer 200 on a real
//! server, the ConfigMap holds a config that validates, and the Service, HPA and PDB point at the
//! Deployment. Field names are the Kubernetes API's (apps/v1, v1, autoscaling/v2, policy/v1).

mod common;

use std::collections::BTreeMap;
use std::net::SocketAddr;
use std::path::Path;

use clap::Parser as _;
use common::server::Server;
use medley::cli::{Cli, Command};
use yaml_rust2::{Yaml, YamlLoader};

const DIR: &str = concat!(env!("CARGO_MANIFEST_DIR"), "/config/k8s");

/// Every manifest by file name, each parsed as exactly one YAML document.
fn manifests() -> BTreeMap<String, Yaml> {
    let mut out = BTreeMap::new();
    for entry in std::fs::read_dir(DIR).unwrap() {
        let path = entry.unwrap().path();
        if path.extension().is_some_and(|e| e == "yaml") {
            let text = std::fs::read_to_string(&path).unwrap();
            let mut docs = YamlLoader::load_from_str(&text)
                .unwrap_or_else(|e| panic!("{} is not YAML: {e}", path.display()));
            assert_eq!(docs.len(), 1, "{}: one document per file", path.display());
            out.insert(path.file_name().unwrap().to_string_lossy().into_owned(), docs.remove(0));
        }
    }
    out
}

fn by_kind<'a>(all: &'a BTreeMap<String, Yaml>, kind: &str) -> &'a Yaml {
    let found: Vec<_> = all.values().filter(|d| d["kind"].as_str() == Some(kind)).collect();
    assert_eq!(found.len(), 1, "exactly one {kind}");
    found[0]
}

fn s(y: &Yaml) -> &str {
    y.as_str().unwrap_or_else(|| panic!("expected a string, got {y:?}"))
}

fn list(y: &Yaml) -> &[Yaml] {
    y.as_vec().unwrap_or_else(|| panic!("expected a list, got {y:?}"))
}

/// The container's named ports.
fn ports(container: &Yaml) -> BTreeMap<String, u16> {
    list(&container["ports"])
        .iter()
        .map(|p| (s(&p["name"]).to_owned(), u16::try_from(p["containerPort"].as_i64().unwrap()).unwrap()))
        .collect()
}

/// The listeners `medley serve` would bind with these args (flags over the config file):
/// config, public, private, gRPC.
fn serve_listeners(args: &[&str]) -> (Option<std::path::PathBuf>, SocketAddr, SocketAddr, SocketAddr) {
    let cli = Cli::try_parse_from(std::iter::once("medley").chain(args.iter().copied()))
        .unwrap_or_else(|e| panic!("the Deployment's args are not a medley command line: {e}"));
    let Command::Serve { config, listen, admin_listen, grpc_listen, .. } = cli.command else {
        panic!("the Deployment must run `medley serve`")
    };
    let grpc = grpc_listen.and_then(|g| g.0).expect("--grpc-listen is set");
    (config, listen.expect("--listen is set"), admin_listen.expect("--admin-listen is set"), grpc)
}

#[test]
fn kustomization_lists_every_manifest() {
    let all = manifests();
    let kustomization = &all["kustomization.yaml"];
    let mut listed: Vec<&str> = list(&kustomization["resources"]).iter().map(s).collect();
    listed.sort_unstable();
    let mut files: Vec<&str> =
        all.keys().map(String::as_str).filter(|f| *f != "kustomization.yaml").collect();
    files.sort_unstable();
    assert_eq!(listed, files);
}

#[tokio::test]
async fn deployment_matches_the_binary_and_its_probes_answer() {
    let all = manifests();
    let deployment = by_kind(&all, "Deployment");
    let pod = &deployment["spec"]["template"];
    let containers = list(&pod["spec"]["containers"]);
    assert_eq!(containers.len(), 1);
    let c = &containers[0];
    let args: Vec<&str> = list(&c["args"]).iter().map(s).collect();
    let (config_path, listen, admin_listen, grpc_listen) = serve_listeners(&args);

    // Ports: the args bind all interfaces on the binary's default ports, and the container
    // declares the same numbers.
    let defaults = medley::serve::config::Config::from_toml(medley::serve::config::DEFAULT_TOML).unwrap();
    let ports = ports(c);
    assert_eq!(listen.port(), defaults.server.listen.port());
    assert_eq!(admin_listen.port(), defaults.server.admin_listen.port());
    assert!(
        listen.ip().is_unspecified() && admin_listen.ip().is_unspecified(),
        "pods are reached on the pod IP"
    );
    assert_eq!(ports["http"], listen.port());
    assert_eq!(ports["admin"], admin_listen.port());
    assert_eq!(grpc_listen.port(), defaults.server.grpc_listen.expect("gRPC is on by default").port());
    assert!(grpc_listen.ip().is_unspecified());
    assert_eq!(ports["grpc"], grpc_listen.port());

    // Scrape annotations name the private listener and the metrics path.
    let ann = &pod["metadata"]["annotations"];
    assert_eq!(s(&ann["prometheus.io/scrape"]), "true");
    assert_eq!(s(&ann["prometheus.io/port"]).parse::<u16>().unwrap(), admin_listen.port());
    let metrics_path = s(&ann["prometheus.io/path"]);

    // The config file is the ConfigMap's key under the volume's mount, mounted whole (no subPath,
    // which would never be updated), and the ConfigMap's config validates.
    let config_path = config_path.expect("--config is set");
    let mounts = list(&c["volumeMounts"]);
    let mount = mounts
        .iter()
        .find(|m| config_path.starts_with(s(&m["mountPath"])))
        .expect("--config lies under a volume mount");
    assert!(mount["subPath"].is_badvalue(), "a subPath mount never sees ConfigMap updates");
    let volume = list(&pod["spec"]["volumes"])
        .iter()
        .find(|v| v["name"] == mount["name"])
        .expect("the mount's volume exists");
    let configmap = by_kind(&all, "ConfigMap");
    assert_eq!(s(&volume["configMap"]["name"]), s(&configmap["metadata"]["name"]));
    let key = config_path.strip_prefix(s(&mount["mountPath"])).unwrap();
    let toml = s(&configmap["data"][key.to_str().unwrap()]);
    let config = medley::serve::config::Config::from_toml(toml)
        .unwrap_or_else(|e| panic!("the ConfigMap's config is invalid: {e}"));
    assert!(config.slices.contains_key("default"));

    // Memory (issue 13, item 3): the README's bound for this config (bodies in flight, plus per
    // pool thread a decoded slate and workspace of about 5x the largest body, plus small bodies
    // decoded inline, plus the base) fits under the container's limit.
    let quantity = |q: &str| -> usize {
        let (number, unit) = q.split_at(q.find(|ch: char| !ch.is_ascii_digit()).unwrap_or(q.len()));
        let shift = match unit {
            "Ki" => 10,
            "Mi" => 20,
            "Gi" => 30,
            "" => 0,
            other => panic!("unexpected memory unit {other:?}"),
        };
        number.parse::<usize>().unwrap() << shift
    };
    let limit = quantity(s(&c["resources"]["limits"]["memory"]));
    let sv = &config.server;
    let bound = sv.max_inflight_body_bytes
        + sv.pool_threads * 5 * sv.max_body_bytes
        + sv.max_in_flight * 5 * medley::http::INLINE_BODY_BELOW
        + (22 << 20);
    assert!(bound <= limit, "memory bound {} MiB over the limit {} MiB", bound >> 20, limit >> 20);
    assert!(quantity(s(&c["resources"]["requests"]["memory"])) <= limit);

    // The probes' paths answer 200 on the listener their port names, on a real server running
    // the ConfigMap's config.
    let server = Server::start(toml).await;
    let base_for = |port: &Yaml| match port.as_str() {
        Some("http") => server.base.clone(),
        Some("admin") => server.admin.clone(),
        other => panic!("probe port {other:?} is not a named container port"),
    };
    for (probe, want) in [("readinessProbe", "/readyz"), ("livenessProbe", "/healthz")] {
        let get = &c[probe]["httpGet"];
        assert_eq!(s(&get["path"]), want, "{probe}");
        let url = format!("{}{}", base_for(&get["port"]), s(&get["path"]));
        assert_eq!(reqwest::get(&url).await.unwrap().status(), 200, "{probe} at {url}");
    }
    let url = format!("{}{metrics_path}", server.admin);
    let metrics = reqwest::get(&url).await.unwrap();
    assert_eq!(metrics.status(), 200);
    assert!(metrics.text().await.unwrap().contains("medley_requests_total"));
    server.stop().await;

    // The pod runs as the image's user (Dockerfile: useradd --uid 10001).
    let dockerfile = std::fs::read_to_string(Path::new(DIR).join("../../Dockerfile")).unwrap();
    let uid = pod["spec"]["securityContext"]["runAsUser"].as_i64().unwrap();
    assert!(dockerfile.contains(&format!("--uid {uid} ")), "runAsUser {uid} is the image's user");
    // The admin token, when set, comes from a Secret and is optional.
    let env = list(&c["env"]);
    let token = env.iter().find(|e| s(&e["name"]) == "MEDLEY_ADMIN_TOKEN").unwrap();
    assert_eq!(token["valueFrom"]["secretKeyRef"]["optional"].as_bool(), Some(true));
}

#[test]
fn service_hpa_and_pdb_point_at_the_deployment() {
    let all = manifests();
    let deployment = by_kind(&all, "Deployment");
    let name = s(&deployment["metadata"]["name"]);
    let labels = &deployment["spec"]["template"]["metadata"]["labels"];
    let selector = &deployment["spec"]["selector"]["matchLabels"];
    let matches = |sel: &Yaml| {
        sel.as_hash().unwrap().iter().all(|(k, v)| labels[s(k)] == *v) && !sel.as_hash().unwrap().is_empty()
    };
    assert!(matches(selector), "the Deployment selects its own pods");

    let service = by_kind(&all, "Service");
    assert!(matches(&service["spec"]["selector"]), "the Service selects the pods");
    let container = &list(&deployment["spec"]["template"]["spec"]["containers"])[0];
    let ports = ports(container);
    for p in list(&service["spec"]["ports"]) {
        let target = s(&p["targetPort"]);
        assert!(["http", "grpc"].contains(&target), "only the public listeners are a Service");
        assert!(ports.contains_key(target));
        assert_eq!(p["port"].as_i64(), Some(i64::from(ports[target])), "the Service keeps the port numbers");
    }

    let hpa = by_kind(&all, "HorizontalPodAutoscaler");
    assert_eq!(s(&hpa["apiVersion"]), "autoscaling/v2");
    let target = &hpa["spec"]["scaleTargetRef"];
    assert_eq!((s(&target["kind"]), s(&target["name"])), ("Deployment", name));
    let (min, max) =
        (hpa["spec"]["minReplicas"].as_i64().unwrap(), hpa["spec"]["maxReplicas"].as_i64().unwrap());
    assert!(2 <= min && min <= max);
    // CPU utilisation is measured against the container's CPU request, so one must be set.
    assert!(container["resources"]["requests"]["cpu"].as_str().is_some());

    let pdb = by_kind(&all, "PodDisruptionBudget");
    assert!(matches(&pdb["spec"]["selector"]["matchLabels"]));
    assert!(pdb["spec"]["minAvailable"].as_i64().unwrap() < min, "a drain can always proceed");
}
