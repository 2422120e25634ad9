//! A throwaway PostgreSQL for the tests: one database per test, on a server started once per
//! test process.
//!
//! With `UNDERSTUDY_PG_URL` set (`.ci/run` sets it), that server is used. Otherwise the first
//! test that asks starts a cluster of its own: `initdb` and `pg_ctl` from Debian's packages
//! (`/usr/lib/postgresql/<version>/bin`), run as the `postgres` user when the tests run as
//! root (PostgreSQL refuses root), data directory and unix socket under
//! `target/pg-test-<pid>/`, listening on no TCP port. It is stopped and removed when the test
//! process exits; clusters left by killed test processes are stopped and removed by the next
//! one. The cluster runs with `fsync = off`: these tests check the store's logic, not the disk.
//!
//! Without a server the PostgreSQL tests print a note and pass vacuously, except when `CI` is
//! set: there they fail, so the suite cannot go green without having run.
//!
//! This file is included by the unit tests and, by path, by the integration tests
//! (`tests/it/helpers.rs`), so it uses nothing of the crate.

#![allow(dead_code, unreachable_pub)]

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::OnceLock;

/// A server the tests may create databases on.
pub struct Server {
    /// The connection string without a database name.
    base: String,
}

/// One test's database, dropped when the value is.
pub struct TestDb {
    /// The connection string of this database.
    pub url: String,
    name: String,
    server: &'static Server,
}

impl Drop for TestDb {
    fn drop(&mut self) {
        let drop_it = format!("DROP DATABASE IF EXISTS \"{}\" WITH (FORCE)", self.name);
        off_runtime(|| {
            if let Ok(mut admin) = self.server.admin() {
                let _ = admin.batch_execute(&drop_it);
            }
        });
    }
}

/// Runs `work` on a thread of its own: the blocking client starts a runtime of its own,
/// which panics on a thread that already drives one (an async test's).
fn off_runtime<T: Send>(work: impl FnOnce() -> T + Send) -> T {
    std::thread::scope(|scope| scope.spawn(work).join().expect("test database work"))
}

static SERVER: OnceLock<Option<Server>> = OnceLock::new();
static CLUSTER: OnceLock<Cluster> = OnceLock::new();
static NEXT_DB: AtomicUsize = AtomicUsize::new(0);

struct Cluster {
    bin: PathBuf,
    root: PathBuf,
    as_postgres: bool,
}

/// A fresh, empty database for one test; `None` (after a printed note) when no server can
/// be had outside CI. Panics under `CI` without a server, and whenever `UNDERSTUDY_PG_URL`
/// names a server that refuses.
pub fn fresh_database(test: &str) -> Option<TestDb> {
    let Some(server) = off_runtime(server) else {
        if std::env::var_os("CI").is_some() {
            panic!("no PostgreSQL for {test}: CI must run the PostgreSQL tests (see .ci/run)");
        }
        eprintln!("note: {test} skipped: no PostgreSQL server (set UNDERSTUDY_PG_URL or install postgresql)");
        return None;
    };
    let mut sanitized: String = test
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() {
                c.to_ascii_lowercase()
            } else {
                '_'
            }
        })
        .collect();
    sanitized.truncate(30);
    let name = format!(
        "ut_{}_{}_{sanitized}",
        std::process::id(),
        NEXT_DB.fetch_add(1, Ordering::SeqCst)
    );
    off_runtime(|| {
        let mut admin = server
            .admin()
            .unwrap_or_else(|e| panic!("the test PostgreSQL refuses connections: {e}"));
        admin
            .batch_execute(&format!("CREATE DATABASE \"{name}\""))
            .unwrap_or_else(|e| panic!("cannot create test database {name}: {e}"));
    });
    Some(TestDb {
        url: with_dbname(&server.base, &name),
        name,
        server,
    })
}

impl Server {
    fn admin(&self) -> Result<postgres::Client, postgres::Error> {
        postgres::Client::connect(&with_dbname(&self.base, "postgres"), postgres::NoTls)
    }
}

fn server() -> Option<&'static Server> {
    SERVER
        .get_or_init(|| match std::env::var("UNDERSTUDY_PG_URL") {
            Ok(url) if !url.trim().is_empty() => Some(Server { base: url }),
            _ => match start_cluster() {
                Ok(server) => Some(server),
                Err(why) => {
                    eprintln!("note: no throwaway PostgreSQL cluster: {why}");
                    None
                }
            },
        })
        .as_ref()
}

/// `url` pointing at database `db`: a URL's path replaced, or `dbname=` appended to a
/// key-value string (the last value of a key wins).
pub fn with_dbname(url: &str, db: &str) -> String {
    for scheme in ["postgresql://", "postgres://"] {
        if let Some(rest) = url.strip_prefix(scheme) {
            let authority_end = rest.find(['/', '?']).unwrap_or(rest.len());
            let query = rest[authority_end..]
                .find('?')
                .map_or("", |q| &rest[authority_end + q..]);
            return format!("{scheme}{}/{db}{query}", &rest[..authority_end]);
        }
    }
    format!("{url} dbname={db}")
}

fn postgres_bin() -> Result<PathBuf, String> {
    let mut versions: Vec<(u32, PathBuf)> = std::fs::read_dir("/usr/lib/postgresql")
        .map_err(|e| format!("/usr/lib/postgresql: {e} (apt-get install postgresql)"))?
        .filter_map(|entry| {
            let entry = entry.ok()?;
            let version: u32 = entry.file_name().to_str()?.parse().ok()?;
            let bin = entry.path().join("bin");
            bin.join("initdb").exists().then_some((version, bin))
        })
        .collect();
    versions.sort();
    versions
        .pop()
        .map(|(_, bin)| bin)
        .ok_or_else(|| "no initdb under /usr/lib/postgresql/*/bin".to_owned())
}

fn is_root() -> bool {
    // SAFETY: geteuid has no preconditions and cannot fail.
    unsafe { libc::geteuid() == 0 }
}

/// Runs a PostgreSQL program, as the `postgres` user when we are root.
fn run(cluster: &Cluster, program: &str, args: &[&str]) -> Result<(), String> {
    let binary = cluster.bin.join(program);
    let mut command = if cluster.as_postgres {
        let mut c = Command::new("runuser");
        c.args(["-u", "postgres", "--"]).arg(&binary);
        c
    } else {
        Command::new(&binary)
    };
    let output = command
        .args(args)
        .output()
        .map_err(|e| format!("{program}: {e}"))?;
    if output.status.success() {
        Ok(())
    } else {
        Err(format!(
            "{program} {}: {}{}",
            output.status,
            String::from_utf8_lossy(&output.stdout),
            String::from_utf8_lossy(&output.stderr)
        ))
    }
}

fn target_dir() -> PathBuf {
    std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| Path::new(env!("CARGO_MANIFEST_DIR")).join("target"))
}

fn start_cluster() -> Result<Server, String> {
    let bin = postgres_bin()?;
    let target = target_dir();
    let as_postgres = is_root();
    stop_abandoned_clusters(&target, &bin, as_postgres);
    let name = format!("pg-test-{}", std::process::id());
    let mut root = target.join(&name);
    if !usable_root(&root, as_postgres)? {
        // The `postgres` user cannot reach target/ (a checkout under a private home), or the
        // socket's path would pass the 107 bytes a unix socket's name may have.
        let _ = std::fs::remove_dir_all(&root);
        root = std::env::temp_dir().join(format!("understudy-{name}"));
        if !usable_root(&root, as_postgres)? {
            return Err(format!("neither target/ nor {} is usable", root.display()));
        }
    }
    let cluster = Cluster {
        bin,
        root: root.clone(),
        as_postgres,
    };
    let data = root.join("data");
    let data_arg = data.to_str().ok_or("a non-UTF-8 target path")?;
    run(
        &cluster,
        "initdb",
        &[
            "-D",
            data_arg,
            "-A",
            "trust",
            "-U",
            "postgres",
            "-E",
            "UTF8",
            "--locale=C",
            "--no-sync",
        ],
    )?;
    let settings = format!(
        "\nlisten_addresses = ''\nunix_socket_directories = '{}'\nport = 5432\nfsync = off\nmax_connections = 300\n",
        root.display()
    );
    use std::io::Write;
    std::fs::OpenOptions::new()
        .append(true)
        .open(data.join("postgresql.conf"))
        .and_then(|mut f| f.write_all(settings.as_bytes()))
        .map_err(|e| format!("postgresql.conf: {e}"))?;
    let log = root.join("server.log");
    run(
        &cluster,
        "pg_ctl",
        &[
            "-D",
            data_arg,
            "-l",
            log.to_str().ok_or("a non-UTF-8 target path")?,
            "-w",
            "-t",
            "60",
            "start",
        ],
    )?;
    let _ = CLUSTER.set(cluster);
    // SAFETY: registers a plain `extern "C" fn()`; it runs once at process exit.
    unsafe {
        libc::atexit(stop_cluster_at_exit);
    }
    Ok(Server {
        base: format!("host={} port=5432 user=postgres", root.display()),
    })
}

/// Creates `root` (owned by `postgres` when we are root) and tells whether the server can
/// use it: writable by its user, and short enough for the socket's path.
fn usable_root(root: &Path, as_postgres: bool) -> Result<bool, String> {
    if root.as_os_str().len() + "/.s.PGSQL.5432.lock".len() > 100 {
        return Ok(false);
    }
    let _ = std::fs::remove_dir_all(root);
    std::fs::create_dir_all(root).map_err(|e| format!("{}: {e}", root.display()))?;
    if !as_postgres {
        return Ok(true);
    }
    let chowned = Command::new("chown")
        .arg("postgres:postgres")
        .arg(root)
        .status()
        .map_err(|e| format!("chown: {e}"))?;
    let writable = Command::new("runuser")
        .args(["-u", "postgres", "--", "test", "-w"])
        .arg(root)
        .status()
        .map_err(|e| format!("runuser: {e}"))?;
    Ok(chowned.success() && writable.success())
}

extern "C" fn stop_cluster_at_exit() {
    if let Some(cluster) = CLUSTER.get() {
        let data = cluster.root.join("data");
        if let Some(data) = data.to_str() {
            let _ = run(
                cluster,
                "pg_ctl",
                &["-D", data, "-m", "immediate", "-w", "stop"],
            );
        }
        let _ = std::fs::remove_dir_all(&cluster.root);
    }
}

/// Stops and removes clusters of test processes that no longer run (killed before their
/// exit hook).
fn stop_abandoned_clusters(target: &Path, bin: &Path, as_postgres: bool) {
    let Ok(entries) = std::fs::read_dir(target) else {
        return;
    };
    for entry in entries.flatten() {
        let name = entry.file_name();
        let Some(pid) = name
            .to_str()
            .and_then(|n| n.strip_prefix("pg-test-"))
            .and_then(|p| p.parse::<i32>().ok())
        else {
            continue;
        };
        // SAFETY: signal 0 only checks whether the process exists.
        let alive = unsafe { libc::kill(pid, 0) == 0 };
        if alive || pid == std::process::id() as i32 {
            continue;
        }
        let cluster = Cluster {
            bin: bin.to_owned(),
            root: entry.path(),
            as_postgres,
        };
        let data = entry.path().join("data");
        if data.join("postmaster.pid").exists() {
            if let Some(data) = data.to_str() {
                let _ = run(
                    &cluster,
                    "pg_ctl",
                    &["-D", data, "-m", "immediate", "-w", "stop"],
                );
            }
        }
        let _ = std::fs::remove_dir_all(entry.path());
    }
}

/// Stops this test process's own cluster (fast shutdown: sessions are ended), for the outage
/// test. Refused when the tests use a server they did not start (`UNDERSTUDY_PG_URL`).
pub fn stop_own_cluster() -> Result<(), String> {
    let cluster = CLUSTER
        .get()
        .ok_or("the tests do not run a cluster of their own")?;
    let data = cluster.root.join("data");
    let data = data.to_str().ok_or("a non-UTF-8 target path")?;
    run(cluster, "pg_ctl", &["-D", data, "-m", "fast", "-w", "stop"])
}

/// Starts this test process's own cluster again after [`stop_own_cluster`].
pub fn start_own_cluster() -> Result<(), String> {
    let cluster = CLUSTER
        .get()
        .ok_or("the tests do not run a cluster of their own")?;
    let data = cluster.root.join("data");
    let log = cluster.root.join("server.log");
    let (Some(data), Some(log)) = (data.to_str(), log.to_str()) else {
        return Err("a non-UTF-8 target path".into());
    };
    run(
        cluster,
        "pg_ctl",
        &["-D", data, "-l", log, "-w", "-t", "60", "start"],
    )
}
