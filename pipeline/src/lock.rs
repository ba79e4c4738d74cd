//! One process at a time per folder that plotsieve writes (a run folder, a season folder,
//! the intake manifest of a season).
//!
//! The lock is a file beside the folder, `.NAME.lock` in its parent, so the folder's own
//! contents stay byte-identical between reruns; it exists only while a process holds it.
//! On Unix it is held with `flock(2)`: the kernel releases it when the holding process ends
//! however it ends, so a lock file left by a killed process is taken over at once (and
//! said). The file records the holder (pid, command, start time) so that a second process
//! is refused naming it. Elsewhere the file is created exclusively and removed on exit; a
//! stale one must then be removed by hand (the message says which).

use anyhow::{bail, Context, Result};
use std::fs::File;
use std::io::{Read, Seek, Write};
use std::path::{Path, PathBuf};

/// A held lock; released when dropped (or when the process ends).
pub struct FolderLock {
    path: PathBuf,
    #[allow(dead_code)]
    file: File,
}

/// The lock file of `folder`: `.NAME.lock` in its parent.
pub fn lock_path(folder: &Path) -> PathBuf {
    let name = folder
        .file_name()
        .map(|n| n.to_string_lossy().to_string())
        .unwrap_or_else(|| "folder".into());
    let parent = folder
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    parent.join(format!(".{name}.lock"))
}

/// Who holds a lock, as written into its file.
fn holder_text() -> String {
    let args: Vec<String> = std::env::args().collect();
    let since = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs())
        .unwrap_or(0);
    format!(
        "pid {}\ncommand {}\nstarted {} (Unix seconds)\n",
        std::process::id(),
        args.join(" "),
        since
    )
}

/// The holder recorded in a lock file, on one line.
fn recorded(file: &mut File) -> String {
    let mut s = String::new();
    let _ = file.rewind();
    let _ = file.read_to_string(&mut s);
    let s = s.trim().replace('\n', ", ");
    if s.is_empty() {
        "a process that has not yet written its name".into()
    } else {
        s
    }
}

impl FolderLock {
    /// Take the lock of `folder` for `what` (e.g. "run folder"), or refuse naming the
    /// process that holds it.
    pub fn acquire(folder: &Path, what: &str) -> Result<FolderLock> {
        let path = lock_path(folder);
        if let Some(p) = path.parent() {
            std::fs::create_dir_all(p).with_context(|| format!("creating {}", p.display()))?;
        }
        imp::acquire(&path, folder, what)
    }
}

#[cfg(unix)]
mod imp {
    use super::*;
    use std::os::unix::io::AsRawFd;

    pub fn acquire(path: &Path, folder: &Path, what: &str) -> Result<FolderLock> {
        use std::os::unix::fs::MetadataExt;
        // A holder removes the file as it releases the lock; a process that opened the old
        // file just before may then lock a file no longer at the path, so the lock counts
        // only once the path still names the locked file (else open again).
        for _ in 0..100 {
            let mut file = std::fs::OpenOptions::new()
                .read(true)
                .write(true)
                .create(true)
                .truncate(false)
                .open(path)
                .with_context(|| format!("opening the lock file {}", path.display()))?;
            // SAFETY: flock on a descriptor this function owns; no memory is shared.
            let r = unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) };
            if r != 0 {
                let err = std::io::Error::last_os_error();
                if err.raw_os_error() == Some(libc::EWOULDBLOCK) {
                    bail!(
                        "{what} {} is in use by another plotsieve process ({}); wait for it to finish, or run into another folder with --out (lock file {})",
                        folder.display(),
                        recorded(&mut file),
                        path.display()
                    );
                }
                return Err(err).with_context(|| format!("locking {}", path.display()));
            }
            let same = match (std::fs::metadata(path), file.metadata()) {
                (Ok(a), Ok(b)) => a.ino() == b.ino() && a.dev() == b.dev(),
                _ => false,
            };
            if !same {
                continue;
            }
            let before = recorded(&mut file);
            if before.starts_with("pid ") {
                // Left by a process that ended without releasing it (killed): the kernel
                // released the lock itself, so it is ours now.
                eprintln!(
                    "note: took over the lock of {what} {} left by a process that is no longer running ({before})",
                    folder.display()
                );
            }
            file.set_len(0)?;
            file.rewind()?;
            file.write_all(holder_text().as_bytes())?;
            file.flush()?;
            return Ok(FolderLock {
                path: path.to_path_buf(),
                file,
            });
        }
        bail!(
            "could not take the lock file {} of {what} {}: it kept being replaced",
            path.display(),
            folder.display()
        )
    }

    /// Released: the file is removed while the lock is still held (a process waiting on
    /// the old file then sees it gone and opens the path again), then the descriptor closes
    /// and the kernel releases the lock.
    pub fn release(l: &mut FolderLock) {
        let _ = std::fs::remove_file(&l.path);
    }
}

#[cfg(not(unix))]
mod imp {
    use super::*;

    pub fn acquire(path: &Path, folder: &Path, what: &str) -> Result<FolderLock> {
        match std::fs::OpenOptions::new()
            .read(true)
            .write(true)
            .create_new(true)
            .open(path)
        {
            Ok(mut file) => {
                file.write_all(holder_text().as_bytes())?;
                Ok(FolderLock {
                    path: path.to_path_buf(),
                    file,
                })
            }
            Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => {
                let mut f = File::open(path)?;
                bail!(
                    "{what} {} is in use by another plotsieve process ({}); if that process is no longer running, remove {}",
                    folder.display(),
                    recorded(&mut f),
                    path.display()
                )
            }
            Err(e) => Err(e).with_context(|| format!("creating {}", path.display())),
        }
    }

    pub fn release(l: &mut FolderLock) {
        let _ = std::fs::remove_file(&l.path);
    }
}

impl Drop for FolderLock {
    fn drop(&mut self) {
        imp::release(self);
    }
}
