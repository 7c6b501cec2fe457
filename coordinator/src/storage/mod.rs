//! Where a run's checkpoints live: one interface, with a local-directory
//! backend (the embedded default). Keys are our own relative names such as
//! `packs/<id>.pack` and `manifests/0000000003.json`; objects are written
//! once and never changed.

mod local;

use std::io;

pub use local::LocalDir;

/// A store of write-once objects.
pub trait Storage: Send + Sync {
    /// Stores `bytes` under `key` unless an object is there already.
    /// Returns true if it wrote, false if the key existed (its content is
    /// not compared: keys of packs are their content hashes). When this
    /// returns Ok the object is whole and durable; a failure leaves no
    /// object under `key`.
    fn put_new(&self, key: &str, bytes: &[u8]) -> io::Result<bool>;

    /// The bytes under `key`, or None when there is no such object.
    fn get(&self, key: &str) -> io::Result<Option<Vec<u8>>>;

    /// The keys that start with `prefix` (a folder such as `manifests/`),
    /// sorted. A missing folder lists as empty.
    fn list(&self, prefix: &str) -> io::Result<Vec<String>>;

    /// Removes the object under `key`; Ok if there was none.
    fn delete(&self, key: &str) -> io::Result<()>;

    /// Where `key` is, for messages: a path or a URL.
    fn locate(&self, key: &str) -> String;
}

/// Keys are made by deeptime from hex ids and numbers; anything else (a
/// path from elsewhere) is refused rather than joined onto a folder.
pub fn check_key(key: &str) -> io::Result<()> {
    let fine = !key.is_empty()
        && key.split('/').all(|part| {
            !part.is_empty()
                && part != "."
                && part != ".."
                && part
                    .bytes()
                    .all(|b| b.is_ascii_alphanumeric() || b == b'.' || b == b'-' || b == b'_')
        });
    if fine {
        Ok(())
    } else {
        Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            format!("storage key {key:?} is not a deeptime key"),
        ))
    }
}
