//! Live configuration: where the config comes from, how it is swapped, and what survives a
//! restart.
//!
//! The live [`Engine`] sits behind an `ArcSwap`. A reload (file change, SIGHUP, `POST
//! /admin/reload`) first validates the file on its own, exactly as `medley check-config` does,
//! then layers the runtime slices over it and validates the result; only then is it stored with
//! the next generation number. A file that fails either step is refused with the message naming
//! the field, counted in `medley_config_reload_failures_total`, and the old engine keeps
//! serving. A result whose digest equals the live one is not a change: nothing is swapped and
//! the generation stays (so re-reading an unchanged file, or a second SIGHUP, is free). Requests
//! already running keep the snapshot they loaded.
//!
//! Runtime slices (set through the admin API) are layered over the file's slices of the same
//! name, on every reload, until deleted. A runtime change rebuilds from the last file that was
//! valid on its own, so a broken edit waiting on disk neither blocks it nor sneaks in with it
//! (not even one that a runtime slice of the same name would hide). With `--overlay FILE` they are also written to that file
//! atomically (a temporary file in the same directory, synced, then renamed over it) and read back
//! at start, so they survive a restart; without it they live until the process exits, and the
//! admin API says so in every answer.
//!
//! Settings fixed at start: the listeners, `pool_threads`, `max_in_flight`,
//! `max_inflight_body_bytes`, `header_timeout_ms` and `max_connections` (a reload that
//! changes them is served with the new values everywhere else, and a warning is logged).

use std::collections::BTreeMap;
use std::io::Write as _;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use arc_swap::ArcSwap;

use crate::serve::catalog::{Catalog, CatalogError};
use crate::serve::config::{Config, ConfigError, RawConfig, RawSlice, DEFAULT_TOML};
use crate::serve::engine::Engine;
use crate::serve::metrics::Metrics;
use crate::serve::shutdown::Shutdown;

/// What asked for a swap; the label of the reload counters.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Trigger {
    /// The config file changed on disk.
    File,
    /// SIGHUP.
    Signal,
    /// `POST /admin/reload`.
    Admin,
    /// `PUT` or `DELETE /admin/slices/{name}`.
    Slice,
}

impl Trigger {
    /// Metric label.
    #[must_use]
    pub fn label(self) -> &'static str {
        match self {
            Self::File => "file",
            Self::Signal => "sighup",
            Self::Admin => "admin",
            Self::Slice => "slice",
        }
    }
}

/// Where the config is read from, and the command-line listener overrides.
#[derive(Debug, Clone, Default)]
pub struct ConfigSource {
    /// The config file; `None` serves the embedded default.
    pub file: Option<PathBuf>,
    /// Where runtime slices persist; `None` keeps them in memory only.
    pub overlay: Option<PathBuf>,
    /// `--listen`, replacing `server.listen`.
    pub listen: Option<SocketAddr>,
    /// `--admin-listen`, replacing `server.admin_listen`.
    pub admin_listen: Option<SocketAddr>,
    /// `--grpc-listen`, replacing `server.grpc_listen` (`Some(None)`: gRPC off).
    pub grpc_listen: Option<Option<SocketAddr>>,
}

fn read_error(path: &Path, e: &std::io::Error) -> ConfigError {
    ConfigError::Parse(format!("reading {}: {e}", path.display()))
}

impl ConfigSource {
    /// A description for logs and the admin view.
    #[must_use]
    pub fn describe(&self) -> String {
        self.file
            .as_ref()
            .map_or_else(|| "embedded config/default.toml".to_owned(), |p| p.display().to_string())
    }

    /// Reads the runtime slices persisted in the overlay file (none when it does not exist yet).
    ///
    /// # Errors
    /// When the overlay exists but cannot be read or parsed.
    pub fn read_overlay(&self) -> Result<BTreeMap<String, RawSlice>, ConfigError> {
        let Some(path) = &self.overlay else { return Ok(BTreeMap::new()) };
        match std::fs::read_to_string(path) {
            Ok(text) => {
                let raw: RawConfig = toml::from_str(&text)
                    .map_err(|e| ConfigError::Parse(format!("overlay {}: {e}", path.display())))?;
                Ok(raw.slices)
            }
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(BTreeMap::new()),
            Err(e) => Err(read_error(path, &e)),
        }
    }

    /// Reads and parses the file (or the embedded default), without validating values.
    ///
    /// # Errors
    /// When the file cannot be read or is not a config document.
    pub fn read_file(&self) -> Result<RawConfig, ConfigError> {
        let text = match &self.file {
            None => DEFAULT_TOML.to_owned(),
            Some(path) => std::fs::read_to_string(path).map_err(|e| read_error(path, &e))?,
        };
        toml::from_str(&text).map_err(|e| ConfigError::Parse(e.to_string()))
    }

    /// Reads the file (or the embedded default), validates it on its own, layers `runtime`
    /// slices over it, validates again, and applies the listener overrides.
    ///
    /// # Errors
    /// The first [`ConfigError`], naming the file or the field.
    pub fn load(&self, runtime: &BTreeMap<String, RawSlice>) -> Result<Config, ConfigError> {
        self.read_valid_file().and_then(|file| self.build(file, runtime))
    }

    /// Reads the file (or the embedded default) and validates it on its own, as `medley
    /// check-config` does, without runtime slices: a slice the file breaks must not pass because
    /// a runtime slice of the same name hides it.
    ///
    /// # Errors
    /// The first [`ConfigError`], naming the file or the field.
    pub fn read_valid_file(&self) -> Result<RawConfig, ConfigError> {
        let file = self.read_file()?;
        Config::from_raw(file.clone())?;
        Ok(file)
    }

    /// Layers `runtime` slices over a parsed file, validates, and applies the listener overrides.
    ///
    /// # Errors
    /// The first [`ConfigError`], naming the field.
    pub fn build(
        &self,
        mut raw: RawConfig,
        runtime: &BTreeMap<String, RawSlice>,
    ) -> Result<Config, ConfigError> {
        for (name, slice) in runtime {
            raw.slices.insert(name.clone(), slice.clone());
        }
        let mut config = Config::from_raw(raw)?;
        if let Some(a) = self.listen {
            config.server.listen = a;
        }
        if let Some(a) = self.admin_listen {
            config.server.admin_listen = a;
        }
        if let Some(a) = self.grpc_listen {
            config.server.grpc_listen = a;
        }
        if let (Some(catalog), Some(file)) = (&config.catalog, &self.file) {
            if catalog.is_relative() {
                let dir = file.parent().unwrap_or_else(|| Path::new(""));
                config.catalog = Some(dir.join(catalog));
            }
        }
        if let (Some(log), Some(file)) = (&mut config.exposure_log, &self.file) {
            if log.dir.is_relative() {
                log.dir = file.parent().unwrap_or_else(|| Path::new("")).join(&log.dir);
            }
        }
        Ok(config)
    }

    /// Loads the item catalog `config` names, if any, as `medley check-config` and a start do.
    ///
    /// # Errors
    /// The [`CatalogError`] naming the row and column at fault.
    pub fn load_catalog(config: &Config) -> Result<Option<Arc<Catalog>>, CatalogError> {
        config
            .catalog
            .as_deref()
            .map(|path| Catalog::load(path, config.server.limits.max_dim).map(Arc::new))
            .transpose()
    }
}

/// A refused catalog as the config error a reload reports (its field is `catalog.path`).
fn catalog_refused(e: &CatalogError) -> ConfigError {
    ConfigError::Invalid { field: "catalog.path".into(), message: e.to_string() }
}

/// The outcome of a reload.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Reloaded {
    /// Generation now serving.
    pub generation: u64,
    /// False when the validated config equals the live one (same digest): nothing was swapped.
    pub changed: bool,
}

/// The outcome of a runtime slice change.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SliceChange {
    /// Generation now serving.
    pub generation: u64,
    /// False when the resulting config equals the live one (same digest): nothing was swapped.
    pub changed: bool,
    /// Whether the change was written to the overlay file (survives a restart).
    pub persisted: bool,
}

/// Why a runtime slice change was not applied.
#[derive(Debug, thiserror::Error)]
pub enum SliceChangeError {
    /// The resulting config is invalid; nothing changed.
    #[error(transparent)]
    Invalid(#[from] ConfigError),
    /// `DELETE` of a slice that is not a runtime slice.
    #[error(
        "slice {0:?} is not a runtime slice; slices from the config file are changed by editing the file"
    )]
    NotRuntime(String),
    /// The overlay file could not be written; nothing changed.
    #[error("writing the overlay {path}: {error}")]
    Persist {
        /// Overlay path.
        path: String,
        /// The I/O error.
        error: std::io::Error,
    },
}

/// Swaps validated configs into the live engine; one at a time.
#[derive(Debug)]
pub struct Reloader {
    source: ConfigSource,
    engine: Arc<ArcSwap<Engine>>,
    metrics: Arc<Metrics>,
    /// The file as last accepted (valid on its own), and the runtime slices layered over it. A
    /// runtime change rebuilds from the accepted file, not the disk, so a broken edit waiting on
    /// disk cannot block it. The mutex also serialises swaps, so generations never race; it is a std mutex
    /// because every holder does short synchronous work (read a small file, validate).
    layers: Mutex<Layers>,
}

#[derive(Debug)]
struct Layers {
    file: RawConfig,
    runtime: BTreeMap<String, RawSlice>,
    /// The catalog the last catalog swap replaced, until the requests holding it finish.
    retired: Option<std::sync::Weak<Catalog>>,
}

/// How long a catalog load waits for the catalog retired by the previous swap to be released
/// before it loads anyway (requests hold it at most a deadline; a stuck one must not block reloads).
const RETIRED_WAIT: Duration = Duration::from_secs(30);

impl Reloader {
    /// A reloader over `engine`, whose current config was built from `file` with `runtime`.
    #[must_use]
    pub fn new(
        source: ConfigSource,
        engine: Arc<ArcSwap<Engine>>,
        metrics: Arc<Metrics>,
        file: RawConfig,
        runtime: BTreeMap<String, RawSlice>,
    ) -> Self {
        Self { source, engine, metrics, layers: Mutex::new(Layers { file, runtime, retired: None }) }
    }

    fn layers(&self) -> std::sync::MutexGuard<'_, Layers> {
        self.layers.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    /// Where the config comes from.
    #[must_use]
    pub fn source(&self) -> &ConfigSource {
        &self.source
    }

    /// The item catalog's file as the live config names it.
    #[must_use]
    pub fn catalog_file(&self) -> Option<PathBuf> {
        self.engine.load().config().catalog.clone()
    }

    /// Names of the runtime slices.
    #[must_use]
    pub fn runtime_slices(&self) -> Vec<String> {
        self.layers().runtime.keys().cloned().collect()
    }

    /// The catalog `config` serves with: the live one when `config` names the same file and the
    /// file is unchanged (size, modification time, inode) and within the new `max_dim`, else a
    /// fresh load. A fresh load first waits (up to [`RETIRED_WAIT`]) until the catalog the
    /// previous swap retired is released by the last request holding it, so at most two catalogs
    /// are held at once: the live one and the one loading.
    fn catalog_for(
        &self,
        config: &Config,
        layers: &mut Layers,
    ) -> Result<Option<Arc<Catalog>>, CatalogError> {
        let Some(path) = config.catalog.as_deref() else { return Ok(None) };
        let live = self.engine.load();
        let fits = |c: &&Arc<Catalog>| c.dim() <= config.server.limits.max_dim;
        if let Some(c) = live.catalog().filter(fits).filter(|c| c.is_current(path)) {
            return Ok(Some(c.clone()));
        }
        drop(live);
        if let Some(retired) = layers.retired.take() {
            let started = std::time::Instant::now();
            while retired.strong_count() > 0 && started.elapsed() < RETIRED_WAIT {
                std::thread::sleep(Duration::from_millis(2));
            }
        }
        let loaded = Catalog::load(path, config.server.limits.max_dim)?;
        tracing::info!(catalog = %path.display(), version = loaded.version(), items = loaded.len(), "catalog loaded");
        Ok(Some(Arc::new(loaded)))
    }

    /// Swaps `config` and `catalog` in, unless they serve exactly what the live engine serves
    /// (same config digest, same catalog version), which is no change at all. The generation
    /// counts config changes: a swap of the catalog alone keeps it.
    fn store(
        &self,
        config: Config,
        catalog: Option<Arc<Catalog>>,
        trigger: Trigger,
        layers: &mut Layers,
    ) -> Reloaded {
        let old = self.engine.load_full();
        let version = |c: Option<&Arc<Catalog>>| c.map(|c| c.version().to_owned());
        let catalog_changed = version(catalog.as_ref()) != version(old.catalog());
        let config_changed = config.digest() != old.digest();
        if !config_changed && !catalog_changed {
            self.metrics.config_reload_unchanged.with_label_values(&[trigger.label()]).inc();
            tracing::debug!(generation = old.generation(), trigger = trigger.label(), "config unchanged");
            return Reloaded { generation: old.generation(), changed: false };
        }
        let fixed = &old.config().server;
        let new = &config.server;
        if new.listen != fixed.listen
            || new.admin_listen != fixed.admin_listen
            || new.pool_threads != fixed.pool_threads
            || new.max_in_flight != fixed.max_in_flight
            || new.max_inflight_body_bytes != fixed.max_inflight_body_bytes
            || new.header_timeout != fixed.header_timeout
            || new.max_connections != fixed.max_connections
        {
            tracing::warn!(
                "listeners, pool_threads, max_in_flight, max_inflight_body_bytes, header_timeout_ms and max_connections change only on restart; keeping the running ones"
            );
        }
        let log_place = |c: &Config| {
            c.exposure_log
                .as_ref()
                .map(|l| (l.dir.clone(), l.max_file_bytes, l.queue, l.queue_bytes, l.compress))
        };
        if log_place(&config) != log_place(old.config()) {
            tracing::warn!(
                "exposure_log dir, max_file_bytes, queue, queue_bytes and compress (and turning the log on) change only on restart; sample_rate applies now"
            );
        }
        let generation = old.generation() + u64::from(config_changed);
        let engine = Arc::new(Engine::new(config, generation).with_catalog(catalog));
        if catalog_changed {
            layers.retired = old.catalog().map(Arc::downgrade);
            self.metrics.set_catalog(engine.catalog().map(|c| &**c));
            self.metrics.catalog_reloads.with_label_values(&[trigger.label()]).inc();
            tracing::info!(
                version = engine.catalog().map_or("none", |c| c.version()),
                trigger = trigger.label(),
                "catalog swapped"
            );
        }
        self.metrics.set_config(generation, engine.digest());
        self.engine.store(engine);
        drop(old);
        if config_changed {
            self.metrics.config_reloads.with_label_values(&[trigger.label()]).inc();
            tracing::info!(generation, trigger = trigger.label(), "config swapped");
        }
        Reloaded { generation, changed: true }
    }

    fn refuse(&self, trigger: Trigger, e: &ConfigError) {
        self.metrics.config_reload_failures.with_label_values(&[trigger.label()]).inc();
        tracing::warn!(trigger = trigger.label(), error = %e, "config refused; the previous one keeps serving");
    }

    fn refuse_catalog(&self, trigger: Trigger, e: &CatalogError) -> ConfigError {
        self.metrics.catalog_reload_failures.with_label_values(&[trigger.label()]).inc();
        tracing::warn!(trigger = trigger.label(), error = %e, "catalog refused; the previous config and catalog keep serving");
        catalog_refused(e)
    }

    /// Re-reads the source, validates the file alone and then with the runtime slices, reloads
    /// the item catalog when its file changed, and swaps the result in when it differs from what
    /// is live. Config and catalog swap together or not at all.
    ///
    /// # Errors
    /// The validation error; the old config (and catalog) keeps serving, and later runtime
    /// changes build on the last file that was valid. A refused catalog is reported as an error
    /// of `catalog.path` and counted in `medley_catalog_reload_failures_total`.
    pub fn reload(&self, trigger: Trigger) -> Result<Reloaded, ConfigError> {
        let mut layers = self.layers();
        let built = self
            .source
            .read_valid_file()
            .and_then(|file| Ok((self.source.build(file.clone(), &layers.runtime)?, file)));
        match built {
            Ok((config, file)) => {
                let catalog =
                    self.catalog_for(&config, &mut layers).map_err(|e| self.refuse_catalog(trigger, &e))?;
                layers.file = file;
                Ok(self.store(config, catalog, trigger, &mut layers))
            }
            Err(e) => {
                self.refuse(trigger, &e);
                Err(e)
            }
        }
    }

    /// Sets (or replaces) runtime slice `name`.
    ///
    /// # Errors
    /// [`SliceChangeError::Invalid`] when the resulting config is invalid,
    /// [`SliceChangeError::Persist`] when the overlay cannot be written; nothing changes then.
    pub fn put_slice(&self, name: &str, slice: RawSlice) -> Result<SliceChange, SliceChangeError> {
        let mut layers = self.layers();
        let mut next = layers.runtime.clone();
        next.insert(name.to_owned(), slice);
        self.apply(&mut layers, next)
    }

    /// Removes runtime slice `name`; the file's slice of that name, if any, serves again.
    ///
    /// # Errors
    /// [`SliceChangeError::NotRuntime`] if `name` is not a runtime slice; otherwise as
    /// [`Reloader::put_slice`] (removing `default` from the runtime layer is fine only when the
    /// file defines it).
    pub fn delete_slice(&self, name: &str) -> Result<SliceChange, SliceChangeError> {
        let mut layers = self.layers();
        if !layers.runtime.contains_key(name) {
            return Err(SliceChangeError::NotRuntime(name.to_owned()));
        }
        let mut next = layers.runtime.clone();
        next.remove(name);
        self.apply(&mut layers, next)
    }

    fn apply(
        &self,
        layers: &mut Layers,
        next: BTreeMap<String, RawSlice>,
    ) -> Result<SliceChange, SliceChangeError> {
        let config = match self.source.build(layers.file.clone(), &next) {
            Ok(c) => c,
            Err(e) => {
                self.refuse(Trigger::Slice, &e);
                return Err(e.into());
            }
        };
        let catalog = self
            .catalog_for(&config, layers)
            .map_err(|e| SliceChangeError::Invalid(self.refuse_catalog(Trigger::Slice, &e)))?;
        let persisted = match &self.source.overlay {
            None => false,
            Some(path) => {
                write_overlay(path, &next)
                    .map_err(|error| SliceChangeError::Persist { path: path.display().to_string(), error })?;
                true
            }
        };
        layers.runtime = next;
        let Reloaded { generation, changed } = self.store(config, catalog, Trigger::Slice, layers);
        Ok(SliceChange { generation, changed, persisted })
    }
}

/// Writes the runtime slices as TOML, atomically: temporary file, fsync, rename.
fn write_overlay(path: &Path, slices: &BTreeMap<String, RawSlice>) -> std::io::Result<()> {
    let doc = RawConfig { slices: slices.clone(), ..RawConfig::default() };
    let text = toml::to_string(&doc).map_err(std::io::Error::other)?;
    let header = "# Runtime slices set through the medley admin API; rewritten on every change.\n";
    let tmp = path.with_extension("tmp");
    {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(header.as_bytes())?;
        f.write_all(text.as_bytes())?;
        f.sync_all()?;
    }
    std::fs::rename(&tmp, path)
}

/// How long file events must be quiet before a reload: editors write, rename and chmod in bursts.
pub const DEBOUNCE: Duration = Duration::from_millis(200);

/// Watches the config file, and the item catalog's file when the config names one, and reloads
/// when either changes, until `shutdown`.
///
/// The watch is on each file's directory, not the file: editors that save by writing a new file
/// and renaming it over the old one replace the inode a file watch would follow (and so does the
/// usual way to publish a catalog: write a temporary file, rename it into place). Events for the
/// files' own names count, and so do events for `..data`: a Kubernetes ConfigMap volume exposes
/// each key as a symlink through `..data`, and updates it by renaming a new `..data` symlink
/// into place, so the file's own name never sees an event (config/k8s/ relies on this). Events
/// for other names in the directory are ignored, and so are events that cannot change content
/// ([`content_may_change`]): reading the file during a reload opens and closes it, and reacting
/// to that would reload forever. After every reload the catalog's directory is watched too, when
/// a new config moved the catalog.
///
/// # Errors
/// When the watch cannot be set up (the directory is gone, or inotify limits are reached).
pub fn watch(
    reloader: Arc<Reloader>,
    shutdown: Shutdown,
) -> notify::Result<Option<tokio::task::JoinHandle<()>>> {
    use notify::Watcher as _;
    let Some(file) = reloader.source().file.clone() else { return Ok(None) };
    let names: Arc<Mutex<Vec<std::ffi::OsString>>> = Arc::default();
    let (tx, mut rx) = tokio::sync::mpsc::unbounded_channel();
    let seen = names.clone();
    let mut watcher = notify::recommended_watcher(move |event: notify::Result<notify::Event>| {
        if let Ok(event) = event {
            let names = seen.lock().unwrap_or_else(std::sync::PoisonError::into_inner);
            if content_may_change(&event.kind)
                && event.paths.iter().any(|p| names.iter().any(|n| watched_name(p, Some(n.as_os_str()))))
            {
                let _ = tx.send(());
            }
        }
    })?;
    let mut dirs: Vec<PathBuf> = Vec::new();
    let mut follow = move |path: &Path, watcher: &mut notify::RecommendedWatcher| -> notify::Result<()> {
        let dir = path
            .parent()
            .filter(|p| !p.as_os_str().is_empty())
            .map_or_else(|| PathBuf::from("."), Path::to_path_buf);
        if let Some(name) = path.file_name() {
            let mut names = names.lock().unwrap_or_else(std::sync::PoisonError::into_inner);
            if !names.iter().any(|n| n == name) {
                names.push(name.to_os_string());
            }
        }
        if !dirs.contains(&dir) {
            watcher.watch(&dir, notify::RecursiveMode::NonRecursive)?;
            dirs.push(dir);
        }
        Ok(())
    };
    follow(&file, &mut watcher)?;
    if let Some(catalog) = reloader.catalog_file() {
        follow(&catalog, &mut watcher)?;
    }
    Ok(Some(tokio::spawn(async move {
        let stop = shutdown.started();
        tokio::pin!(stop);
        loop {
            tokio::select! {
                () = &mut stop => break,
                event = rx.recv() => {
                    if event.is_none() {
                        break;
                    }
                    // Debounce: wait until the directory has been quiet for DEBOUNCE.
                    while let Ok(Some(())) = tokio::time::timeout(DEBOUNCE, rx.recv()).await {}
                    let r = reloader.clone();
                    let _ = tokio::task::spawn_blocking(move || r.reload(Trigger::File)).await;
                    if let Some(catalog) = reloader.catalog_file() {
                        if let Err(e) = follow(&catalog, &mut watcher) {
                            tracing::warn!(error = %e, catalog = %catalog.display(), "cannot watch the catalog's directory; reload it with SIGHUP or the admin API");
                        }
                    }
                }
            }
        }
    })))
}

/// Whether an event of this kind can change what the file holds: creation, a write, a rename or
/// move (the `..data` swap is one), removal, and the queue-overflow rescan (`Other` with the
/// rescan flag, after which anything may have happened). Opening, reading and closing the file
/// (`Access`), and `chmod`/`touch` (`Modify(Metadata)`), cannot.
#[must_use]
pub fn content_may_change(kind: &notify::EventKind) -> bool {
    use notify::event::ModifyKind;
    use notify::EventKind;
    match kind {
        EventKind::Access(_) | EventKind::Modify(ModifyKind::Metadata(_)) => false,
        EventKind::Create(_)
        | EventKind::Modify(_)
        | EventKind::Remove(_)
        | EventKind::Any
        | EventKind::Other => true,
    }
}

/// Whether an event on `path` may have changed the config file called `name`.
fn watched_name(path: &Path, name: Option<&std::ffi::OsStr>) -> bool {
    let Some(changed) = path.file_name() else { return false };
    Some(changed) == name || changed == "..data"
}

/// Reloads on SIGHUP until `shutdown` (Unix only; elsewhere it returns at once).
pub async fn on_sighup(reloader: Arc<Reloader>, shutdown: Shutdown) {
    #[cfg(unix)]
    {
        let Ok(mut hup) = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::hangup()) else {
            tracing::warn!("cannot listen for SIGHUP; reload through the file or the admin API");
            return;
        };
        let stop = shutdown.started();
        tokio::pin!(stop);
        loop {
            tokio::select! {
                () = &mut stop => break,
                got = hup.recv() => {
                    if got.is_none() {
                        break;
                    }
                    let r = reloader.clone();
                    let _ = tokio::task::spawn_blocking(move || r.reload(Trigger::Signal)).await;
                }
            }
        }
    }
    #[cfg(not(unix))]
    let _ = (reloader, shutdown);
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A relative `[catalog] path` is relative to the config file's directory, not the working
    /// directory (so a ConfigMap can name a file beside it); an absolute one stays.
    #[test]
    fn a_relative_catalog_path_is_resolved_against_the_config_directory() {
        let source =
            ConfigSource { file: Some(PathBuf::from("/etc/medley/medley.toml")), ..Default::default() };
        let raw = |path: &str| {
            toml::from_str::<RawConfig>(&format!("[catalog]\npath = {path:?}\n[slices.default]\n")).unwrap()
        };
        let built = source.build(raw("items.parquet"), &BTreeMap::new()).unwrap();
        assert_eq!(built.catalog.as_deref(), Some(Path::new("/etc/medley/items.parquet")));
        let built = source.build(raw("/data/items.parquet"), &BTreeMap::new()).unwrap();
        assert_eq!(built.catalog.as_deref(), Some(Path::new("/data/items.parquet")));
    }
}
