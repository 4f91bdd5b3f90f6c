//! A throwaway PostgreSQL server for the tests that need one: `initdb` into
//! a temporary directory, a free loopback port, started with `pg_ctl` and
//! stopped and removed when dropped. As root, the cluster runs as the
//! unprivileged `nobody` (PostgreSQL refuses to run as root).
//!
//! Where the server binaries are not installed, [`PgCluster::start`]
//! returns None after saying the test skipped, unless `CI=true`: CI installs
//! PostgreSQL (`.ci/run`), so there a missing server fails the test.

use std::net::TcpListener;
use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};

use super::service::TempDir;

pub struct PgCluster {
    bin: PathBuf,
    data: PathBuf,
    pub port: u16,
    /// The uid and gid the cluster runs as, when the tests run as root.
    user: Option<(u32, u32)>,
    // Last: removed after the server stopped.
    dir: TempDir,
}

/// Where `initdb`, `pg_ctl` and `postgres` are: `PLUMBLINE_PG_BIN`, then
/// the directory an `initdb` on PATH links to, then Debian's
/// `/usr/lib/postgresql/<version>/bin` (the newest).
pub fn server_binaries() -> Option<PathBuf> {
    let has_all = |d: &Path| {
        ["initdb", "pg_ctl", "postgres", "createdb"]
            .iter()
            .all(|b| d.join(b).exists())
    };
    if let Some(d) = std::env::var_os("PLUMBLINE_PG_BIN").map(PathBuf::from) {
        return has_all(&d).then_some(d);
    }
    if let Some(path) = std::env::var_os("PATH") {
        for d in std::env::split_paths(&path) {
            if let Ok(real) = std::fs::canonicalize(d.join("initdb")) {
                if let Some(dir) = real.parent().filter(|d| has_all(d)) {
                    return Some(dir.to_path_buf());
                }
            }
        }
    }
    let mut versions: Vec<(u32, PathBuf)> = std::fs::read_dir("/usr/lib/postgresql")
        .ok()?
        .filter_map(|e| e.ok())
        .filter_map(|e| {
            let v = e.file_name().to_str()?.parse().ok()?;
            Some((v, e.path().join("bin")))
        })
        .filter(|(_, d)| has_all(d))
        .collect();
    versions.sort();
    versions.pop().map(|(_, d)| d)
}

/// Says why a PostgreSQL test did not run; under `CI=true` that is a
/// failure.
pub fn skip(test: &str, why: &str) {
    if std::env::var("CI").as_deref() == Ok("true") {
        panic!("{test}: {why}; CI installs PostgreSQL, so this test must run there");
    }
    eprintln!("skipped {test}: {why} (install PostgreSQL's server to run it)");
}

fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .map(|a| a.port())
        .expect("a free loopback port")
}

impl PgCluster {
    /// A new cluster, or None (said) when PostgreSQL is not installed.
    pub fn start(test: &str) -> Option<PgCluster> {
        let Some(bin) = server_binaries() else {
            skip(
                test,
                "PostgreSQL server binaries (initdb, pg_ctl) not found",
            );
            return None;
        };
        let dir = TempDir::new(&format!("pg-{test}"));
        // SAFETY: geteuid has no preconditions.
        let root = unsafe { libc::geteuid() } == 0;
        let user = root.then(|| {
            let nobody = c"nobody";
            // SAFETY: a valid NUL-terminated name; the record is read at once.
            let pw = unsafe { libc::getpwnam(nobody.as_ptr()) };
            assert!(!pw.is_null(), "no user 'nobody' to run PostgreSQL as");
            // SAFETY: checked non-null above.
            unsafe { ((*pw).pw_uid, (*pw).pw_gid) }
        });
        if let Some((uid, gid)) = user {
            std::os::unix::fs::chown(&dir.0, Some(uid), Some(gid)).expect("chown the cluster dir");
        }
        let cluster = PgCluster {
            data: dir.0.join("data"),
            bin,
            port: free_port(),
            user,
            dir,
        };
        let initdb = cluster
            .command("initdb")
            .arg("-D")
            .arg(&cluster.data)
            .args([
                "-U",
                "plumbline",
                "-A",
                "trust",
                "-E",
                "UTF8",
                "--locale=C",
                "--no-sync",
            ])
            .output()
            .expect("run initdb");
        assert!(
            initdb.status.success(),
            "initdb failed: {}",
            String::from_utf8_lossy(&initdb.stderr)
        );
        let options = format!(
            "-p {} -k {} -c listen_addresses=127.0.0.1 -c fsync=off -c synchronous_commit=off \
             -c full_page_writes=off -c max_connections=200",
            cluster.port,
            cluster.dir.0.display()
        );
        let started = cluster
            .command("pg_ctl")
            .arg("-D")
            .arg(&cluster.data)
            .args(["-o", &options, "-l"])
            .arg(cluster.dir.0.join("server.log"))
            .args(["-w", "-t", "60", "start"])
            .output()
            .expect("run pg_ctl start");
        assert!(
            started.status.success(),
            "pg_ctl start failed: {}\n{}",
            String::from_utf8_lossy(&started.stderr),
            std::fs::read_to_string(cluster.dir.0.join("server.log")).unwrap_or_default()
        );
        Some(cluster)
    }

    fn command(&self, program: &str) -> Command {
        let mut c = Command::new(self.bin.join(program));
        c.stdin(Stdio::null()).env_remove("PGDATA");
        if let Some((uid, gid)) = self.user {
            c.uid(uid).gid(gid).current_dir(&self.dir.0);
        }
        c
    }

    /// A new empty database on the cluster; its URL.
    pub fn database(&self, name: &str) -> String {
        let out = Command::new(self.bin.join("createdb"))
            .args([
                "-h",
                "127.0.0.1",
                "-U",
                "plumbline",
                "-p",
                &self.port.to_string(),
                name,
            ])
            .stdin(Stdio::null())
            .output()
            .expect("run createdb");
        assert!(
            out.status.success(),
            "createdb {name}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        self.url(name)
    }

    pub fn url(&self, database: &str) -> String {
        format!("postgres://plumbline@127.0.0.1:{}/{database}", self.port)
    }

    /// The server's log, for a failing test's message.
    pub fn log(&self) -> String {
        std::fs::read_to_string(self.dir.0.join("server.log")).unwrap_or_default()
    }
}

impl Drop for PgCluster {
    fn drop(&mut self) {
        let _ = self
            .command("pg_ctl")
            .arg("-D")
            .arg(&self.data)
            .args(["-m", "immediate", "-w", "stop"])
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status();
    }
}
