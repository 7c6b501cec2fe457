//! A decorator over any storage backend that counts the bytes read through
//! it (whole objects and ranges), so a command can report, and a test can
//! check, how much of a run's storage it touched.

use std::io;
use std::sync::atomic::{AtomicU64, Ordering};

use super::Storage;

/// A backend whose reads are counted.
pub struct Counting {
    inner: Box<dyn Storage>,
    read: AtomicU64,
}

impl Counting {
    pub fn new(inner: Box<dyn Storage>) -> Counting {
        Counting {
            inner,
            read: AtomicU64::new(0),
        }
    }

    /// Bytes returned by `get` and `get_range` so far.
    pub fn bytes_read(&self) -> u64 {
        self.read.load(Ordering::Relaxed)
    }

    fn count(&self, read: &io::Result<Option<Vec<u8>>>) {
        if let Ok(Some(bytes)) = read {
            self.read.fetch_add(bytes.len() as u64, Ordering::Relaxed);
        }
    }
}

impl Storage for Counting {
    fn put_new(&self, key: &str, bytes: &[u8]) -> io::Result<bool> {
        self.inner.put_new(key, bytes)
    }

    fn replace(&self, key: &str, bytes: &[u8]) -> io::Result<()> {
        self.inner.replace(key, bytes)
    }

    fn get(&self, key: &str, max: u64) -> io::Result<Option<Vec<u8>>> {
        let read = self.inner.get(key, max);
        self.count(&read);
        read
    }

    fn get_range(&self, key: &str, offset: u64, len: u64) -> io::Result<Option<Vec<u8>>> {
        let read = self.inner.get_range(key, offset, len);
        self.count(&read);
        read
    }

    fn list(&self, prefix: &str) -> io::Result<Vec<String>> {
        self.inner.list(prefix)
    }

    fn delete(&self, key: &str) -> io::Result<()> {
        self.inner.delete(key)
    }

    fn lock(&self) -> io::Result<Option<std::fs::File>> {
        self.inner.lock()
    }

    fn locate(&self, key: &str) -> String {
        self.inner.locate(key)
    }
}
