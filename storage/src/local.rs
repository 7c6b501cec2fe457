//! The local-directory backend: each object a file, written to a temporary
//! file beside it, flushed to disk, then renamed into place without
//! replacing anything, and the folder flushed too (and a new folder's
//! parent, so the folder itself survives a crash). Temporary files start
//! with `.incoming-`: readers skip them and the writer lock removes those a
//! killed writer left.

use std::fs::{self, File};
use std::io::{self, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use super::{Storage, check_key};

/// Objects as files under one folder.
pub struct LocalDir {
    root: PathBuf,
}

impl LocalDir {
    pub fn new(root: PathBuf) -> LocalDir {
        LocalDir { root }
    }
}

impl Storage for LocalDir {
    fn put_new(&self, key: &str, bytes: &[u8]) -> io::Result<bool> {
        check_key(key)?;
        let path = self.root.join(key);
        if path.exists() {
            return Ok(false);
        }
        let (folder, temporary) = flushed_temporary(&path, bytes)?;
        match temporary.persist_noclobber(&path) {
            Ok(_) => {}
            Err(error) if error.error.kind() == io::ErrorKind::AlreadyExists => return Ok(false),
            Err(error) => return Err(error.error),
        }
        // The rename is durable only once the folder is.
        File::open(&folder)?.sync_all()?;
        Ok(true)
    }

    fn replace(&self, key: &str, bytes: &[u8]) -> io::Result<()> {
        check_key(key)?;
        let path = self.root.join(key);
        let (folder, temporary) = flushed_temporary(&path, bytes)?;
        temporary.persist(&path).map_err(|error| error.error)?;
        File::open(&folder)?.sync_all()?;
        Ok(())
    }

    fn get(&self, key: &str, max: u64) -> io::Result<Option<Vec<u8>>> {
        check_key(key)?;
        let path = self.root.join(key);
        let Some(file) = open_existing(&path)? else {
            return Ok(None);
        };
        let size = file.metadata()?.len();
        if size > max {
            return Err(too_large(&path, size, max));
        }
        // The file may grow between the check and the read: read at most
        // one byte past the limit to know.
        let mut bytes = Vec::with_capacity(size as usize);
        file.take(max + 1).read_to_end(&mut bytes)?;
        if bytes.len() as u64 > max {
            return Err(too_large(&path, bytes.len() as u64, max));
        }
        Ok(Some(bytes))
    }

    fn get_range(&self, key: &str, offset: u64, len: u64) -> io::Result<Option<Vec<u8>>> {
        check_key(key)?;
        let path = self.root.join(key);
        let Some(mut file) = open_existing(&path)? else {
            return Ok(None);
        };
        let size = file.metadata()?.len();
        if offset.checked_add(len).is_none_or(|end| end > size) {
            return Err(io::Error::new(
                io::ErrorKind::UnexpectedEof,
                format!(
                    "{}: {len} bytes at {offset} run past its end ({size} bytes)",
                    path.display()
                ),
            ));
        }
        file.seek(SeekFrom::Start(offset))?;
        let mut bytes = vec![0u8; len as usize];
        file.read_exact(&mut bytes)?;
        Ok(Some(bytes))
    }

    fn list(&self, prefix: &str) -> io::Result<Vec<String>> {
        let folder = prefix.trim_end_matches('/');
        check_key(folder)?;
        let entries = match fs::read_dir(self.root.join(folder)) {
            Ok(entries) => entries,
            Err(error) if error.kind() == io::ErrorKind::NotFound => return Ok(Vec::new()),
            Err(error) => return Err(error),
        };
        let mut keys = Vec::new();
        for entry in entries {
            let name = entry?.file_name();
            let Some(name) = name.to_str() else { continue };
            if name.starts_with('.') {
                continue; // an unfinished write
            }
            keys.push(format!("{folder}/{name}"));
        }
        keys.sort();
        Ok(keys)
    }

    fn delete(&self, key: &str) -> io::Result<()> {
        check_key(key)?;
        match fs::remove_file(self.root.join(key)) {
            Ok(()) => Ok(()),
            Err(error) if error.kind() == io::ErrorKind::NotFound => Ok(()),
            Err(error) => Err(error),
        }
    }

    fn lock(&self) -> io::Result<Option<File>> {
        make_folder(&self.root)?;
        let file = fs::OpenOptions::new()
            .create(true)
            .truncate(false)
            .write(true)
            .open(self.root.join(".lock"))?;
        match file.try_lock() {
            Ok(()) => {
                clear_unfinished(&self.root)?;
                Ok(Some(file))
            }
            Err(fs::TryLockError::WouldBlock) => Err(io::Error::new(
                io::ErrorKind::WouldBlock,
                format!(
                    "another deeptime process is writing to {} (run or prune)",
                    self.root.display()
                ),
            )),
            Err(fs::TryLockError::Error(error)) => Err(error),
        }
    }

    fn locate(&self, key: &str) -> String {
        self.root.join(key).display().to_string()
    }
}

/// `bytes` in a temporary file beside `path` (in its folder, made if
/// needed), flushed to disk: ready to be renamed into place.
fn flushed_temporary(
    path: &std::path::Path,
    bytes: &[u8],
) -> io::Result<(PathBuf, tempfile::NamedTempFile)> {
    let folder = path.parent().expect("keys have a folder").to_path_buf();
    make_folder(&folder)?;
    let mut temporary = tempfile::Builder::new()
        .prefix(".incoming-")
        .tempfile_in(&folder)?;
    temporary.write_all(bytes)?;
    temporary.as_file().sync_all()?;
    Ok((folder, temporary))
}

fn open_existing(path: &Path) -> io::Result<Option<File>> {
    match File::open(path) {
        Ok(file) => Ok(Some(file)),
        Err(error) if error.kind() == io::ErrorKind::NotFound => Ok(None),
        Err(error) => Err(error),
    }
}

fn too_large(path: &Path, size: u64, max: u64) -> io::Error {
    io::Error::new(
        io::ErrorKind::InvalidData,
        format!(
            "{} is {size} bytes, over the limit of {max} for it",
            path.display()
        ),
    )
}

/// Makes `folder` and any missing parents, flushing each new folder's
/// parent so that the new entry is durable before anything is put in it.
pub(super) fn make_folder(folder: &Path) -> io::Result<()> {
    if folder.is_dir() {
        return Ok(());
    }
    if let Some(parent) = folder.parent().filter(|p| !p.as_os_str().is_empty()) {
        make_folder(parent)?;
    }
    match fs::create_dir(folder) {
        Ok(()) => {}
        Err(error) if error.kind() == io::ErrorKind::AlreadyExists => return Ok(()),
        Err(error) => return Err(error),
    }
    let parent = match folder.parent() {
        Some(parent) if !parent.as_os_str().is_empty() => parent,
        _ => Path::new("."),
    };
    File::open(parent)?.sync_all()
}

/// Removes the temporary files of unfinished writes (a writer killed
/// between writing and renaming) from the store's folders.
fn clear_unfinished(root: &Path) -> io::Result<()> {
    for folder in [
        root.to_path_buf(),
        root.join("packs"),
        root.join("manifests"),
    ] {
        let entries = match fs::read_dir(&folder) {
            Ok(entries) => entries,
            Err(error) if error.kind() == io::ErrorKind::NotFound => continue,
            Err(error) => return Err(error),
        };
        for entry in entries {
            let entry = entry?;
            if entry
                .file_name()
                .to_string_lossy()
                .starts_with(".incoming-")
            {
                match fs::remove_file(entry.path()) {
                    Ok(()) => {}
                    Err(error) if error.kind() == io::ErrorKind::NotFound => {}
                    Err(error) => return Err(error),
                }
            }
        }
    }
    Ok(())
}
