//! The local-directory backend: each object a file, written to a temporary
//! file beside it, flushed to disk, then renamed into place without
//! replacing anything, and the folder flushed too.

use std::fs::{self, File};
use std::io::{self, Write};
use std::path::PathBuf;

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

    fn get(&self, key: &str) -> io::Result<Option<Vec<u8>>> {
        check_key(key)?;
        match fs::read(self.root.join(key)) {
            Ok(bytes) => Ok(Some(bytes)),
            Err(error) if error.kind() == io::ErrorKind::NotFound => Ok(None),
            Err(error) => Err(error),
        }
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
        fs::create_dir_all(&self.root)?;
        let file = fs::OpenOptions::new()
            .create(true)
            .truncate(false)
            .write(true)
            .open(self.root.join(".lock"))?;
        match file.try_lock() {
            Ok(()) => Ok(Some(file)),
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
    fs::create_dir_all(&folder)?;
    let mut temporary = tempfile::Builder::new()
        .prefix(".incoming-")
        .tempfile_in(&folder)?;
    temporary.write_all(bytes)?;
    temporary.as_file().sync_all()?;
    Ok((folder, temporary))
}
