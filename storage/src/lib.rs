//! Where a run's checkpoints live: one interface, with a local-directory
//! backend (the embedded default) and an S3-compatible one, and a counting
//! decorator that wraps either. Keys are our own relative names such as
//! `packs/<id>.pack` and `manifests/0000000003.json`; objects are written
//! once and never changed.

pub mod checkpoint;
mod counting;
mod local;
mod s3;

use std::io;
use std::path::Path;

pub use counting::Counting;
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

/// The identity of a checkpoint folder, for telling whether two processes
/// write to the same one: the `s3://` URL without a trailing slash, or the
/// folder's canonical absolute path (made if missing, so that both sides
/// resolve links alike).
pub fn location(place: &Path) -> io::Result<String> {
    let text = place.to_string_lossy();
    if let Some(at) = text.find("s3://") {
        return Ok(text[at..].trim_end_matches('/').to_string());
    }
    std::fs::create_dir_all(place)?;
    Ok(std::fs::canonicalize(place)?.to_string_lossy().into_owned())
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

    /// The bytes under `key`, or None when there is no such object. An
    /// object larger than `max` bytes is refused (`InvalidData`, naming its
    /// size) before its bytes are read.
    fn get(&self, key: &str, max: u64) -> io::Result<Option<Vec<u8>>>;

    /// Exactly `len` bytes from `offset` of the object under `key`, or None
    /// when there is no such object. A range that runs past the object's
    /// end is an error (`UnexpectedEof`); only the range is read.
    fn get_range(&self, key: &str, offset: u64, len: u64) -> io::Result<Option<Vec<u8>>>;

    /// The keys that start with `prefix` (a folder such as `manifests/`),
    /// sorted. A missing folder lists as empty.
    fn list(&self, prefix: &str) -> io::Result<Vec<String>>;

    /// Removes the object under `key`; Ok if there was none.
    fn delete(&self, key: &str) -> io::Result<()>;

    /// Takes this store's writer lock, held until the returned guard is
    /// dropped: one process writes (runs, prunes) at a time. Fails at once
    /// if another process holds it. Once held, removes what unfinished
    /// writes of a killed writer left (readers never see those). A store
    /// without locks returns None (then the operator keeps to one writer
    /// per store); its writes leave nothing unfinished behind.
    fn lock(&self) -> io::Result<Option<std::fs::File>>;

    /// Where `key` is, for messages: a path or a URL.
    fn locate(&self, key: &str) -> String;
}

/// A shared backend is a backend (so a caller can keep a handle on a
/// decorator, such as `Counting`, that it hands over).
impl<T: Storage + ?Sized> Storage for std::sync::Arc<T> {
    fn put_new(&self, key: &str, bytes: &[u8]) -> io::Result<bool> {
        (**self).put_new(key, bytes)
    }

    fn replace(&self, key: &str, bytes: &[u8]) -> io::Result<()> {
        (**self).replace(key, bytes)
    }

    fn get(&self, key: &str, max: u64) -> io::Result<Option<Vec<u8>>> {
        (**self).get(key, max)
    }

    fn get_range(&self, key: &str, offset: u64, len: u64) -> io::Result<Option<Vec<u8>>> {
        (**self).get_range(key, offset, len)
    }

    fn list(&self, prefix: &str) -> io::Result<Vec<String>> {
        (**self).list(prefix)
    }

    fn delete(&self, key: &str) -> io::Result<()> {
        (**self).delete(key)
    }

    fn lock(&self) -> io::Result<Option<std::fs::File>> {
        (**self).lock()
    }

    fn locate(&self, key: &str) -> String {
        (**self).locate(key)
    }
}

/// The key of the pack named `name` (its checksum in hex).
pub fn pack_key(name: &str) -> String {
    format!("packs/{name}.pack")
}

/// Stores a pack under its name (the checksum of `bytes`); returns the
/// name in hex. The same pack may be there from an earlier attempt (or a
/// node that wrote the same quads): it is used only if it is whole, else
/// the good bytes take its place. Errors name the object.
pub fn put_pack(storage: &dyn Storage, bytes: &[u8]) -> anyhow::Result<String> {
    use anyhow::Context;
    let name = deeptime_engine::pack::pack_name(bytes).to_string();
    let key = pack_key(&name);
    let place = storage.locate(&key);
    let wrote = storage
        .put_new(&key, bytes)
        .with_context(|| format!("cannot write {place}"))?;
    if !wrote {
        let stored = match storage.get(&key, bytes.len() as u64) {
            Ok(stored) => stored,
            // Longer than it should be: damaged.
            Err(error) if error.kind() == io::ErrorKind::InvalidData => None,
            Err(error) => return Err(error).with_context(|| format!("cannot read {place}")),
        };
        if stored.as_deref() != Some(bytes) {
            storage
                .replace(&key, bytes)
                .with_context(|| format!("cannot repair {place}"))?;
        }
    }
    Ok(name)
}

/// Byte ranges of a checkpoint's packs (by their index in its manifest),
/// from a storage backend: what a reader on demand fetches through.
pub struct PackFetch<'s> {
    pub storage: &'s dyn Storage,
    /// the packs' keys, in the manifest's order
    pub keys: Vec<String>,
}

use deeptime_engine::stored::FetchError;

impl deeptime_engine::stored::Fetch for PackFetch<'_> {
    fn fetch(&mut self, pack: usize, offset: u64, len: u64) -> Result<Vec<u8>, FetchError> {
        let key = self
            .keys
            .get(pack)
            .ok_or_else(|| FetchError::Missing("no such pack".to_string()))?;
        match self.storage.get_range(key, offset, len) {
            Ok(Some(bytes)) => Ok(bytes),
            Ok(None) => Err(FetchError::Missing("missing".to_string())),
            Err(error) => Err(FetchError::Failed(format!("cannot read: {error}"))),
        }
    }
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
            store.get("manifests/0000000001.json", 3).unwrap().unwrap(),
            b"one"
        );
        assert_eq!(store.get("manifests/0000000009.json", 100).unwrap(), None);
        let counted: Vec<u8> = (0..100_000u32).map(|at| (at % 251) as u8).collect();
        assert!(store.put_new("packs/abc.pack", &counted).unwrap());
        assert_eq!(
            store.get("packs/abc.pack", 100_000).unwrap().unwrap(),
            counted
        );
        // Over the limit: refused before reading, naming the size.
        let error = store.get("packs/abc.pack", 99_999).unwrap_err();
        assert_eq!(error.kind(), io::ErrorKind::InvalidData);
        assert!(error.to_string().contains("100000 bytes"), "{error}");
        // Ranges: exactly the bytes asked for; past the end is an error.
        assert_eq!(
            store
                .get_range("packs/abc.pack", 70_000, 5)
                .unwrap()
                .unwrap(),
            &counted[70_000..70_005]
        );
        assert_eq!(
            store
                .get_range("packs/abc.pack", 99_990, 10)
                .unwrap()
                .unwrap(),
            &counted[99_990..]
        );
        assert_eq!(store.get_range("packs/none.pack", 0, 1).unwrap(), None);
        let error = store.get_range("packs/abc.pack", 99_990, 11).unwrap_err();
        assert_eq!(error.kind(), io::ErrorKind::UnexpectedEof, "{error}");
        assert_eq!(
            store.list("manifests/").unwrap(),
            vec!["manifests/0000000001.json", "manifests/0000000002.json"]
        );
        assert_eq!(store.list("packs/").unwrap(), vec!["packs/abc.pack"]);
        store.replace("packs/abc.pack", b"repaired").unwrap();
        assert_eq!(
            store.get("packs/abc.pack", 100).unwrap().unwrap(),
            b"repaired"
        );
        store.delete("manifests/0000000002.json").unwrap();
        store.delete("manifests/0000000002.json").unwrap(); // absent: fine
        assert_eq!(
            store.list("manifests/").unwrap(),
            vec!["manifests/0000000001.json"]
        );
        // Keys from elsewhere are refused, never joined onto a path.
        assert!(store.get("../etc/passwd", 100).is_err());
        assert!(store.get_range("../etc/passwd", 0, 1).is_err());
        assert!(store.put_new("/abs", b"x").is_err());
        assert!(store.delete("a/../b").is_err());
    }

    #[test]
    fn a_local_directory_keeps_the_contract() {
        let dir = tempfile::tempdir().unwrap();
        keeps_the_contract(&LocalDir::new(dir.path().to_path_buf()));
    }

    #[test]
    fn a_counted_store_keeps_the_contract_and_counts_what_it_reads() {
        let dir = tempfile::tempdir().unwrap();
        let counted = Counting::new(Box::new(LocalDir::new(dir.path().to_path_buf())));
        keeps_the_contract(&counted);
        // The bytes the contract read back: "one", 100000, 5, 10, "repaired"
        // (counted by hand from the suite above).
        assert_eq!(counted.bytes_read(), 3 + 100_000 + 5 + 10 + 8);
    }

    #[test]
    fn the_writer_lock_clears_unfinished_writes_and_readers_ignore_them() {
        let dir = tempfile::tempdir().unwrap();
        let store = LocalDir::new(dir.path().to_path_buf());
        assert!(store.put_new("packs/abc.pack", b"whole").unwrap());
        let left = dir.path().join("packs/.incoming-killed");
        std::fs::write(&left, b"half a pack").unwrap();
        assert_eq!(store.list("packs/").unwrap(), vec!["packs/abc.pack"]);
        let guard = store.lock().unwrap();
        assert!(guard.is_some());
        assert!(!left.exists(), "the writer removes what a killed one left");
        assert_eq!(store.list("packs/").unwrap(), vec!["packs/abc.pack"]);
    }

    #[test]
    fn folders_are_made_whole_from_the_nearest_existing_one() {
        let dir = tempfile::tempdir().unwrap();
        let deep = dir.path().join("a/b/c");
        local::make_folder(&deep).unwrap();
        assert!(deep.is_dir());
        local::make_folder(&deep).unwrap(); // already there: fine
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
