//! The `medley` binary: parse the command line, set up logging, run one subcommand, and turn
//! its outcome into an exit code (0 on success, 1 on any error, with the error on stderr).

use std::io::{BufReader, BufWriter, Write};
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::Context as _;
use clap::Parser as _;

use medley::cli::{Cli, Command, LogFormat};
use medley::http::{serve_with, AppState};
use medley::serve::config::Config;
use medley::serve::engine::Engine;
use medley::serve::metrics::Metrics;
use medley::serve::pool::Pool;
use medley::serve::reload::ConfigSource;
use medley::serve::shutdown;

fn main() -> ExitCode {
    let cli = Cli::parse();
    init_logging(cli.log_format);
    match run(cli.command) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("medley: {e:#}");
            ExitCode::FAILURE
        }
    }
}

fn init_logging(format: LogFormat) {
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info"));
    use std::io::IsTerminal as _;
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .with_ansi(std::io::stderr().is_terminal());
    match format {
        LogFormat::Text => builder.init(),
        LogFormat::Json => builder.json().init(),
    }
}

/// Loads a config the way `serve` does (file or embedded default), without an overlay.
fn load_config(path: Option<std::path::PathBuf>) -> anyhow::Result<Config> {
    let source = ConfigSource { file: path, ..ConfigSource::default() };
    source.load(&Default::default()).with_context(|| format!("invalid config in {}", source.describe()))
}

/// An engine over `config` with its item catalog: `catalog` when given, else the config's own.
fn engine_with_catalog(mut config: Config, catalog: Option<std::path::PathBuf>) -> anyhow::Result<Engine> {
    if catalog.is_some() {
        config.catalog = catalog;
    }
    let loaded = ConfigSource::load_catalog(&config).context("loading the item catalog")?;
    if let Some(c) = &loaded {
        eprintln!(
            "medley: item catalog {} ({} items, d = {}, version {})",
            c.path().display(),
            c.len(),
            c.dim(),
            c.version()
        );
    }
    Ok(Engine::new(config, 1).with_catalog(loaded))
}

/// `-` is standard output; anything else a file to create.
fn open_output(path: &str) -> anyhow::Result<Box<dyn Write>> {
    Ok(if path == "-" {
        Box::new(BufWriter::new(std::io::stdout().lock()))
    } else {
        Box::new(BufWriter::new(std::fs::File::create(path).with_context(|| format!("creating {path}"))?))
    })
}

fn run(command: Command) -> anyhow::Result<()> {
    match command {
        Command::Serve { config, listen, admin_listen, grpc_listen, overlay } => {
            let grpc_listen = grpc_listen.map(|g| g.0);
            let source = ConfigSource { file: config, overlay, listen, admin_listen, grpc_listen };
            let runtime = tokio::runtime::Builder::new_multi_thread()
                .enable_all()
                .build()
                .context("starting the runtime")?;
            runtime.block_on(serve_main(source))
        }
        Command::Rerank { input, output, config, catalog } => {
            let config = load_config(config)?;
            let pool = Pool::new(config.server.pool_threads, 0).context("starting the pool")?;
            let engine = engine_with_catalog(config, catalog)?;
            let mut reader: Box<dyn std::io::BufRead> = if input == "-" {
                Box::new(BufReader::new(std::io::stdin().lock()))
            } else {
                Box::new(BufReader::new(
                    std::fs::File::open(&input).with_context(|| format!("opening {input}"))?,
                ))
            };
            let mut writer = open_output(&output)?;
            let summary = medley::offline::batch::run(&engine, &pool, &mut reader, &mut writer)?;
            eprintln!("{summary}");
            Ok(())
        }
        Command::Sample {
            requests,
            candidates,
            dim,
            seed,
            with_clicks,
            b64,
            with_profiles,
            with_groups,
            one,
            catalog,
            output,
        } => {
            let spec = medley::offline::sample::SampleSpec {
                requests: if one { 1 } else { requests },
                candidates: candidates.unwrap_or(if one { 6 } else { 200 }),
                dim: dim.unwrap_or(if one { 4 } else { 32 }),
                seed,
                with_clicks,
                b64,
                with_profiles,
                with_groups,
            };
            let mut writer = open_output(&output)?;
            match catalog {
                None => medley::offline::sample::write(&spec, &mut writer).context("writing the corpus"),
                Some(path) => medley::offline::sample::write_with_catalog(&spec, &path, &mut writer)
                    .with_context(|| format!("writing the corpus and the catalog {}", path.display())),
            }
        }
        Command::Replay {
            input,
            clicks,
            propensity_eta,
            ips_clip,
            algorithms,
            lambdas,
            k,
            windows,
            out,
            catalog,
            pick,
        } => {
            let algorithms = algorithms
                .split(',')
                .map(|name| {
                    medley::diversify::by_name(name.trim())
                        .with_context(|| format!("unknown algorithm {name:?} in --algorithms"))
                })
                .collect::<anyhow::Result<Vec<_>>>()?;
            let lambdas = medley::offline::replay::parse_lambdas(&lambdas)
                .map_err(anyhow::Error::msg)
                .context("--lambdas")?;
            let pick = pick
                .map(|p| medley::offline::replay::parse_pick(&p))
                .transpose()
                .map_err(anyhow::Error::msg)?;
            anyhow::ensure!((1..=1000).contains(&k), "--k {k} is outside 1..=1000");
            if let Some(w) = windows.iter().find(|w| !(2..=1000).contains(*w)) {
                anyhow::bail!("--windows: {w} is outside 2..=1000");
            }
            anyhow::ensure!(
                propensity_eta.is_finite() && propensity_eta >= 0.0,
                "--propensity-eta {propensity_eta} must be a finite number >= 0"
            );
            anyhow::ensure!(ips_clip.is_finite() && ips_clip >= 1.0, "--ips-clip {ips_clip} must be >= 1");
            // Replay validates on an unlocked default slice with the embedded limits.
            let engine = engine_with_catalog(Config::embedded_default(), catalog)?;
            let clicks = clicks.map(|path| medley::offline::replay::Clicks::read(&path)).transpose()?;
            let opts = medley::offline::replay::Options {
                algorithms,
                lambdas,
                windows,
                k,
                out,
                pick,
                eta: propensity_eta,
                clip: ips_clip,
                progress: true,
            };
            print!("{}", medley::offline::replay::run(&engine, &input, clicks.as_ref(), &opts)?);
            Ok(())
        }
        Command::CheckConfig { file } => {
            let config = load_config(Some(file))?;
            let catalog = ConfigSource::load_catalog(&config).context("invalid item catalog")?;
            print!("{}", medley::serve::config::describe(&config));
            if let Some(c) = catalog {
                println!(
                    "catalog: {} ({} items, d = {}, version {})",
                    c.path().display(),
                    c.len(),
                    c.dim(),
                    c.version()
                );
            }
            Ok(())
        }
    }
}

async fn serve_main(source: ConfigSource) -> anyhow::Result<()> {
    let token = std::env::var("MEDLEY_ADMIN_TOKEN").ok();
    let described = source.describe();
    let state = AppState::start(source, Arc::new(Metrics::new()), token)
        .with_context(|| format!("starting with {described}"))?;
    let server = state.engine.load().config().server.clone();
    let public = tokio::net::TcpListener::bind(server.listen)
        .await
        .with_context(|| format!("binding {}", server.listen))?;
    let admin = tokio::net::TcpListener::bind(server.admin_listen)
        .await
        .with_context(|| format!("binding {}", server.admin_listen))?;
    let grpc = match server.grpc_listen {
        Some(addr) => Some(
            tokio::net::TcpListener::bind(addr).await.with_context(|| format!("binding {addr} (gRPC)"))?,
        ),
        None => None,
    };
    let grpc_listen = match &grpc {
        Some(l) => l.local_addr()?.to_string(),
        None => "off".to_owned(),
    };
    tracing::info!(
        listen = %public.local_addr()?,
        admin_listen = %admin.local_addr()?,
        grpc_listen = %grpc_listen,
        pool_threads = state.pool.threads(),
        config = %described,
        "medley serving"
    );
    let (trigger, token) = shutdown::channel();
    tokio::spawn(async move {
        shutdown::signal().await;
        trigger.fire();
    });
    let beside = {
        let (state, token) = (state.clone(), token.clone());
        async move {
            if let Some(listener) = grpc {
                medley::grpc::serve(listener, state, token).await;
            }
        }
    };
    serve_with(public, admin, state, token, beside).await;
    tracing::info!("drained; exiting");
    Ok(())
}
