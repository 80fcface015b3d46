//! Moving inbox entries into the archive and quarantine folders, never overwriting anything.
//!
//! A backfill moves tens of thousands of files into one month's folder, so a move is one
//! system call where the file system allows it: the folder is made once per [`Mover`], and
//! the rename itself refuses to replace an existing entry (`renameat2` with
//! `RENAME_NOREPLACE` on Linux) instead of a look-up of the name before it. That also closes
//! the window in which another process could create the same name between the look-up and
//! the rename. Where the file system does not offer it, the name is looked up first as before.

use std::collections::HashSet;
use std::io::ErrorKind;
use std::path::{Path, PathBuf};

use super::IngestError;

/// Moves entries into folders, making each folder at most once (and again if it vanished).
#[derive(Debug, Default)]
pub(super) struct Mover {
    made: HashSet<PathBuf>,
    /// Set when the file system refused `RENAME_NOREPLACE`: look names up first from then on.
    no_exclusive_rename: bool,
}

impl Mover {
    /// Moves `path` into folder `dir` under its own name (or a free variant of it, see
    /// [`candidate`]); returns where it went.
    pub(super) fn move_into(&mut self, path: &Path, dir: &Path) -> Result<PathBuf, IngestError> {
        self.make(path, dir)?;
        let name = path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        match self.place(path, dir, &name) {
            Ok(dest) => Ok(dest),
            // The folder was removed since it was made: make it again and move once more.
            Err((_, e)) if e.kind() == ErrorKind::NotFound && present(path) && !present(dir) => {
                self.made.remove(dir);
                self.make(path, dir)?;
                self.place(path, dir, &name)
                    .map_err(|(to, source)| IngestError::Move {
                        from: path.into(),
                        to,
                        source,
                    })
            }
            // Taken away meanwhile: the store already has it, nothing is lost.
            Err((dest, e)) if e.kind() == ErrorKind::NotFound => Ok(dest),
            Err((to, source)) => Err(IngestError::Move {
                from: path.into(),
                to,
                source,
            }),
        }
    }

    fn make(&mut self, path: &Path, dir: &Path) -> Result<(), IngestError> {
        if !self.made.contains(dir) {
            std::fs::create_dir_all(dir).map_err(|source| IngestError::Move {
                from: path.into(),
                to: dir.into(),
                source,
            })?;
            self.made.insert(dir.to_owned());
        }
        Ok(())
    }

    /// Renames `from` to the first free candidate name in `dir`; on failure, the name tried.
    fn place(
        &mut self,
        from: &Path,
        dir: &Path,
        name: &str,
    ) -> Result<PathBuf, (PathBuf, std::io::Error)> {
        let (mut k, mut across) = (1, false);
        while !self.no_exclusive_rename {
            let to = candidate(dir, name, k);
            match rename_exclusive(from, &to) {
                Ok(()) => return Ok(to),
                Err(e) if e.kind() == ErrorKind::AlreadyExists => k += 1,
                Err(e) if is_unsupported(&e) => self.no_exclusive_rename = true,
                Err(e) if is_cross_device(&e) => {
                    across = true;
                    break;
                }
                Err(e) => return Err((to, e)),
            }
        }
        let to = free_name_from(dir, name, k);
        // Across file systems the rename has already failed: straight to the copy.
        let moved = if across {
            copy_across(from, &to)
        } else {
            move_entry(from, &to)
        };
        match moved {
            Ok(()) => Ok(to),
            Err(e) => Err((to, e)),
        }
    }
}

/// True when `path` names an entry (not following a symbolic link).
fn present(path: &Path) -> bool {
    std::fs::symlink_metadata(path).is_ok()
}

/// `dir/name` for k = 1, else `dir/stem-k.ext`.
fn candidate(dir: &Path, name: &str, k: u32) -> PathBuf {
    if k <= 1 {
        return dir.join(name);
    }
    let (stem, ext) = match name.rfind('.') {
        Some(i) if i > 0 => (&name[..i], &name[i..]),
        _ => (name, ""),
    };
    dir.join(format!("{stem}-{k}{ext}"))
}

/// `dir/name`, or `dir/stem-2.ext`, `dir/stem-3.ext`... when taken (looked up, not reserved).
pub(super) fn free_name(dir: &Path, name: &str) -> PathBuf {
    free_name_from(dir, name, 1)
}

fn free_name_from(dir: &Path, name: &str, first: u32) -> PathBuf {
    (first..)
        .map(|k| candidate(dir, name, k))
        .find(|p| std::fs::symlink_metadata(p).is_err())
        .expect("some free name exists")
}

/// Renames `from` to `to` unless `to` exists (then `AlreadyExists`), in one system call.
#[cfg(all(target_os = "linux", target_env = "gnu"))]
fn rename_exclusive(from: &Path, to: &Path) -> std::io::Result<()> {
    let (from, to) = (c_path(from)?, c_path(to)?);
    // SAFETY: both are valid NUL-terminated paths that live across the call.
    let rc = unsafe {
        libc::renameat2(
            libc::AT_FDCWD,
            from.as_ptr(),
            libc::AT_FDCWD,
            to.as_ptr(),
            libc::RENAME_NOREPLACE,
        )
    };
    if rc == 0 {
        Ok(())
    } else {
        Err(std::io::Error::last_os_error())
    }
}

#[cfg(not(all(target_os = "linux", target_env = "gnu")))]
fn rename_exclusive(_from: &Path, _to: &Path) -> std::io::Result<()> {
    Err(ErrorKind::Unsupported.into())
}

/// The file system (or kernel) does not offer `RENAME_NOREPLACE`.
fn is_unsupported(e: &std::io::Error) -> bool {
    e.kind() == ErrorKind::Unsupported
        || matches!(e.raw_os_error(), Some(libc::EINVAL) | Some(libc::ENOSYS))
}

/// Moves `from` to `to` (a free name): a rename, or across file systems (archive or quarantine
/// on another mount) a copy under a temporary name in the destination folder, fsynced, renamed
/// into place, the folder fsynced, and only then the source removed.
///
/// A crash in between leaves the file in the inbox as well as at `to`. That is safe: a stored
/// file's content hash is already in the store, so the file is taken again and archived as a
/// duplicate; a refused file is refused again. A leftover temporary file is hidden (`.` name).
pub(super) fn move_entry(from: &Path, to: &Path) -> std::io::Result<()> {
    match std::fs::rename(from, to) {
        Err(e) if is_cross_device(&e) => copy_across(from, to),
        other => other,
    }
}

fn is_cross_device(e: &std::io::Error) -> bool {
    e.kind() == std::io::ErrorKind::CrossesDevices || e.raw_os_error() == Some(18)
}

/// The cross-file-system half of [`move_entry`]. A symbolic link is moved as a link (never
/// followed); other entries that are not regular files cannot be copied and keep the error.
fn copy_across(from: &Path, to: &Path) -> std::io::Result<()> {
    let dir = to.parent().unwrap_or(Path::new("."));
    let name = to
        .file_name()
        .map(|n| n.to_string_lossy())
        .unwrap_or_default();
    let tmp = dir.join(format!(".{name}.{}.tmp", std::process::id()));
    let meta = std::fs::symlink_metadata(from)?;
    let copied = if meta.file_type().is_symlink() {
        std::fs::read_link(from).and_then(|target| std::os::unix::fs::symlink(target, &tmp))
    } else if std::os::unix::fs::FileTypeExt::is_fifo(&meta.file_type()) {
        make_fifo(&tmp)
    } else if meta.is_file() {
        copy_synced(from, &tmp)
    } else {
        return Err(std::io::Error::from_raw_os_error(18));
    };
    let placed = copied.and_then(|()| std::fs::rename(&tmp, to));
    if let Err(e) = placed {
        let _ = std::fs::remove_file(&tmp);
        return Err(e);
    }
    std::fs::File::open(dir)?.sync_all()?;
    std::fs::remove_file(from)
}

/// A new named pipe at `path` (a pipe holds no data: this is its move across file systems).
fn make_fifo(path: &Path) -> std::io::Result<()> {
    let c = c_path(path)?;
    // SAFETY: `c` is a valid NUL-terminated path that lives across the call.
    if unsafe { libc::mkfifo(c.as_ptr(), 0o600) } == 0 {
        Ok(())
    } else {
        Err(std::io::Error::last_os_error())
    }
}

/// `path` as a C string for a system call (a path with a NUL byte is invalid input).
fn c_path(path: &Path) -> std::io::Result<std::ffi::CString> {
    use std::os::unix::ffi::OsStrExt;
    std::ffi::CString::new(path.as_os_str().as_bytes())
        .map_err(|e| std::io::Error::new(ErrorKind::InvalidInput, e))
}

/// Copies a regular file's bytes to a new file `to` and fsyncs it.
fn copy_synced(from: &Path, to: &Path) -> std::io::Result<()> {
    let mut src = std::fs::File::open(from)?;
    let mut dst = std::fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(to)?;
    std::io::copy(&mut src, &mut dst)?;
    dst.sync_all()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn file(dir: &Path, name: &str, body: &str) -> PathBuf {
        let p = dir.join(name);
        std::fs::write(&p, body).unwrap();
        p
    }

    fn read(p: &Path) -> String {
        std::fs::read_to_string(p).unwrap()
    }

    /// Both ways of moving (one exclusive rename, or a look-up then a rename) keep every
    /// entry already in the folder and give a taken name the next free suffix.
    #[test]
    fn moves_never_overwrite_and_take_the_next_free_name() {
        for exclusive in [true, false] {
            let root = tempfile::tempdir().unwrap();
            let (inbox, archive) = (root.path().join("inbox"), root.path().join("a/2026-12"));
            std::fs::create_dir_all(&inbox).unwrap();
            let mut mover = Mover {
                no_exclusive_rename: !exclusive,
                ..Mover::default()
            };
            let first = mover
                .move_into(&file(&inbox, "lot.csv", "one"), &archive)
                .unwrap();
            assert_eq!(first, archive.join("lot.csv"));
            file(&archive, "lot-2.csv", "placed by someone else");
            let second = mover
                .move_into(&file(&inbox, "lot.csv", "two"), &archive)
                .unwrap();
            assert_eq!(second, archive.join("lot-3.csv"), "exclusive: {exclusive}");
            assert_eq!(read(&first), "one");
            assert_eq!(read(&archive.join("lot-2.csv")), "placed by someone else");
            assert_eq!(read(&second), "two");
            assert!(!inbox.join("lot.csv").exists());
        }
    }

    #[test]
    fn a_folder_removed_between_moves_is_made_again() {
        let root = tempfile::tempdir().unwrap();
        let archive = root.path().join("archive");
        let mut mover = Mover::default();
        mover
            .move_into(&file(root.path(), "a.csv", "a"), &archive)
            .unwrap();
        std::fs::remove_dir_all(&archive).unwrap();
        let dest = mover
            .move_into(&file(root.path(), "b.csv", "b"), &archive)
            .unwrap();
        assert_eq!(read(&dest), "b");
        assert!(!root.path().join("b.csv").exists());
    }

    #[test]
    fn a_file_taken_away_before_its_move_is_not_an_error() {
        let root = tempfile::tempdir().unwrap();
        let mut mover = Mover::default();
        let dest = mover
            .move_into(&root.path().join("gone.csv"), &root.path().join("archive"))
            .unwrap();
        assert_eq!(dest, root.path().join("archive/gone.csv"));
        assert!(!dest.exists());
    }

    #[test]
    fn a_dangling_link_in_the_folder_is_not_replaced() {
        let root = tempfile::tempdir().unwrap();
        let archive = root.path().join("archive");
        std::fs::create_dir(&archive).unwrap();
        std::os::unix::fs::symlink(root.path().join("nowhere"), archive.join("x.csv")).unwrap();
        assert_eq!(free_name(&archive, "x.csv"), archive.join("x-2.csv"));
        let dest = Mover::default()
            .move_into(&file(root.path(), "x.csv", "x"), &archive)
            .unwrap();
        assert_eq!(dest, archive.join("x-2.csv"));
        assert!(
            std::fs::symlink_metadata(archive.join("x.csv"))
                .unwrap()
                .is_symlink()
        );
    }

    /// The copy path of a cross-file-system move, run on one file system (the tmpfs test in
    /// tests/moves.rs runs it for real).
    #[test]
    fn copying_across_moves_files_links_and_pipes() {
        use std::os::unix::fs::FileTypeExt;
        let src = tempfile::tempdir().unwrap();
        let dst = tempfile::tempdir().unwrap();
        let file = src.path().join("a.csv");
        std::fs::write(&file, b"bytes").unwrap();
        copy_across(&file, &dst.path().join("a.csv")).unwrap();
        assert_eq!(std::fs::read(dst.path().join("a.csv")).unwrap(), b"bytes");
        let link = src.path().join("l.csv");
        std::os::unix::fs::symlink("/nowhere", &link).unwrap();
        copy_across(&link, &dst.path().join("l.csv")).unwrap();
        assert_eq!(
            std::fs::read_link(dst.path().join("l.csv")).unwrap(),
            PathBuf::from("/nowhere")
        );
        let pipe = src.path().join("p.csv");
        make_fifo(&pipe).unwrap();
        copy_across(&pipe, &dst.path().join("p.csv")).unwrap();
        let moved = std::fs::symlink_metadata(dst.path().join("p.csv")).unwrap();
        assert!(moved.file_type().is_fifo());
        assert_eq!(std::fs::read_dir(src.path()).unwrap().count(), 0);
        assert_eq!(
            std::fs::read_dir(dst.path()).unwrap().count(),
            3,
            "no temporary left"
        );
    }

    #[test]
    fn free_names_do_not_overwrite() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join("a.csv"), b"x").unwrap();
        assert_eq!(free_name(dir.path(), "a.csv"), dir.path().join("a-2.csv"));
        assert_eq!(free_name(dir.path(), "b.csv"), dir.path().join("b.csv"));
    }
}
