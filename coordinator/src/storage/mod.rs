//! Where a run's checkpoints live: one interface, with a local-directory
//! backend (the embedded default). Keys are our own relative names such as
//! `packs/<id>.pack` and `manifests/0000000003.json`; objects are written
//! once and never changed.

mod local;
mod s3;

use std::io;
use std::path::Path;

pub use local::LocalDir;
pub use s3::S3;

/// The backend for a run's `checkpoint.dir`: an `s3://bucket/prefix` URL or
/// a local folder.
pub fn open(place: &Path) -> io::Result<Box<dyn Storage>> {
    let text = place.to_string_lossy();
    match text.find("s3://") {
        Some(at) => Ok(Box::new(S3::open(&text[at..])?)),
        None => Ok(Box::new(LocalDir::new(place.to_path_buf()))),
    }
}

/// A store of write-once objects.
pub trait Storage: Send + Sync {
    /// Stores `bytes` under `key` unless an object is there already.
    /// Returns true if it wrote, false if the key existed (its content is
    /// not compared: keys of packs are their content hashes). When this
    /// returns Ok the object is whole and durable; a failure leaves no
    /// object under `key`.
    fn put_new(&self, key: &str, bytes: &[u8]) -> io::Result<bool>;

    /// Stores `bytes` under `key`, replacing what is there, atomically (a
    /// reader sees the old object or the new one, whole). Only for repairing
    /// a content-named object whose stored bytes are damaged.
    fn replace(&self, key: &str, bytes: &[u8]) -> io::Result<()>;

    /// The bytes under `key`, or None when there is no such object.
    fn get(&self, key: &str) -> io::Result<Option<Vec<u8>>>;

    /// The keys that start with `prefix` (a folder such as `manifests/`),
    /// sorted. A missing folder lists as empty.
    fn list(&self, prefix: &str) -> io::Result<Vec<String>>;

    /// Removes the object under `key`; Ok if there was none.
    fn delete(&self, key: &str) -> io::Result<()>;

    /// Takes this store's writer lock, held until the returned guard is
    /// dropped: one process writes (runs, prunes) at a time. Fails at once
    /// if another process holds it. A store without locks returns None
    /// (then the operator keeps to one writer per store).
    fn lock(&self) -> io::Result<Option<std::fs::File>>;

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

/// The contract every backend must keep, run against each of them.
#[cfg(test)]
mod contract {
    use super::*;

    fn keeps_the_contract(store: &dyn Storage) {
        assert_eq!(store.list("manifests/").unwrap(), Vec::<String>::new());
        assert!(store.put_new("manifests/0000000002.json", b"two").unwrap());
        assert!(store.put_new("manifests/0000000001.json", b"one").unwrap());
        // Write-once: a second put of the same key changes nothing.
        assert!(
            !store
                .put_new("manifests/0000000001.json", b"other")
                .unwrap()
        );
        assert_eq!(
            store.get("manifests/0000000001.json").unwrap().unwrap(),
            b"one"
        );
        assert_eq!(store.get("manifests/0000000009.json").unwrap(), None);
        assert!(store.put_new("packs/abc.pack", &[0u8; 100_000]).unwrap());
        assert_eq!(store.get("packs/abc.pack").unwrap().unwrap().len(), 100_000);
        assert_eq!(
            store.list("manifests/").unwrap(),
            vec!["manifests/0000000001.json", "manifests/0000000002.json"]
        );
        assert_eq!(store.list("packs/").unwrap(), vec!["packs/abc.pack"]);
        store.replace("packs/abc.pack", b"repaired").unwrap();
        assert_eq!(store.get("packs/abc.pack").unwrap().unwrap(), b"repaired");
        store.delete("manifests/0000000002.json").unwrap();
        store.delete("manifests/0000000002.json").unwrap(); // absent: fine
        assert_eq!(
            store.list("manifests/").unwrap(),
            vec!["manifests/0000000001.json"]
        );
        // Keys from elsewhere are refused, never joined onto a path.
        assert!(store.get("../etc/passwd").is_err());
        assert!(store.put_new("/abs", b"x").is_err());
        assert!(store.delete("a/../b").is_err());
    }

    #[test]
    fn a_local_directory_keeps_the_contract() {
        let dir = tempfile::tempdir().unwrap();
        keeps_the_contract(&LocalDir::new(dir.path().to_path_buf()));
    }

    #[test]
    fn an_s3_compatible_server_keeps_the_contract() {
        // tests/run-tests starts one on loopback and names a bucket in it.
        let url = std::env::var("DEEPTIME_S3_URL").expect(
            "DEEPTIME_S3_URL is not set: run the tests with tests/run-tests, which starts an \
             S3-compatible server on loopback",
        );
        let nonce = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .unwrap()
            .as_nanos();
        let store = S3::open(&format!("{url}/contract-{nonce}")).unwrap();
        keeps_the_contract(&store);
    }
}
