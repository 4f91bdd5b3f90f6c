//! One server per data directory: an advisory lock (`flock`) on a file
//! beside the database, held for the server's life and released by the
//! kernel however the process ends, so a crash never leaves a stale claim.

use std::fs::{File, OpenOptions};
use std::io::{Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use crate::store::{StoreError, StoreResult};

/// A held claim on a data directory; dropping it releases the lock.
#[derive(Debug)]
pub struct Claim {
    _file: File,
    path: PathBuf,
}

impl Claim {
    /// Claims the directory of `database` through `<database>.lock`, or
    /// says which process holds it.
    pub fn take(database: &Path) -> StoreResult<Claim> {
        let path = database.with_extension("lock");
        let mut file = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(&path)
            .map_err(|e| StoreError::Backend(format!("{}: {e}", path.display())))?;
        if !try_lock(&file) {
            let mut holder = String::new();
            let _ = file.read_to_string(&mut holder);
            let holder = holder.trim();
            let who = if holder.is_empty() {
                "another process".to_string()
            } else {
                format!("process {holder}")
            };
            let dir = database.parent().unwrap_or(database);
            return Err(StoreError::InUse(format!(
                "data directory {} is in use by {who} (lock {}); stop that server or choose \
                 another --data-dir",
                dir.display(),
                path.display()
            )));
        }
        // Ours now: record who holds it, for the next one's message.
        let _ = file.set_len(0);
        let _ = file.seek(SeekFrom::Start(0));
        let _ = writeln!(file, "{}", std::process::id());
        let _ = file.flush();
        Ok(Claim { _file: file, path })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }
}

#[cfg(unix)]
fn try_lock(file: &File) -> bool {
    use std::os::unix::io::AsRawFd;
    // SAFETY: flock on a descriptor this File owns; no memory is shared.
    unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) == 0 }
}

#[cfg(not(unix))]
fn try_lock(_file: &File) -> bool {
    true
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_second_claim_on_one_directory_is_refused_until_the_first_is_dropped() {
        let dir = std::env::temp_dir().join(format!("plumbline-claim-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("dir");
        let db = dir.join("plumbline.sqlite");
        let first = Claim::take(&db).expect("first claim");
        match Claim::take(&db) {
            Err(StoreError::InUse(msg)) => {
                assert!(msg.contains(&std::process::id().to_string()), "{msg}");
                assert!(msg.contains("--data-dir"), "{msg}");
            }
            other => panic!("second claim: {other:?}"),
        }
        drop(first);
        let again = Claim::take(&db).expect("claim after release");
        assert!(again.path().ends_with("plumbline.lock"));
        drop(again);
        let _ = std::fs::remove_dir_all(&dir);
    }
}
