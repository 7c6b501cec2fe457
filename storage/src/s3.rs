//! The S3-compatible object-store backend (for clusters, or any run whose
//! checkpoints should live off the machine). Create-only puts make objects
//! write-once as on the local backend; the calls run on a small runtime of
//! their own, since the rest of the embedded run is synchronous.

use std::io;

use futures::TryStreamExt;
use object_store::aws::{AmazonS3, AmazonS3Builder};
use object_store::path::Path;
use object_store::{ObjectStore, ObjectStoreExt, PutMode, PutOptions, PutPayload};

use super::{Storage, check_key};

/// Objects under a prefix of one bucket.
pub struct S3 {
    store: AmazonS3,
    bucket: String,
    prefix: String,
    runtime: tokio::runtime::Runtime,
}

impl S3 {
    /// `url` is `s3://BUCKET/PREFIX`. The endpoint, region and credentials
    /// come from the usual environment variables (`AWS_ENDPOINT`,
    /// `AWS_REGION`, `AWS_ACCESS_KEY_ID`, `AWS_SECRET_ACCESS_KEY`,
    /// `AWS_ALLOW_HTTP=true` for a plain-HTTP endpoint).
    pub fn open(url: &str) -> io::Result<S3> {
        let rest = url
            .strip_prefix("s3://")
            .ok_or_else(|| invalid(format!("{url:?} is not an s3:// URL")))?;
        let (bucket, prefix) = rest.split_once('/').unwrap_or((rest, ""));
        if bucket.is_empty() {
            return Err(invalid(format!("{url:?} names no bucket")));
        }
        let prefix = prefix.trim_matches('/').to_string();
        if !prefix.is_empty() {
            check_key(&prefix)?;
        }
        let store = AmazonS3Builder::from_env()
            .with_bucket_name(bucket)
            .build()
            .map_err(|error| invalid(format!("{url}: {error}")))?;
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()?;
        Ok(S3 {
            store,
            bucket: bucket.to_string(),
            prefix,
            runtime,
        })
    }

    fn path(&self, key: &str) -> Path {
        if self.prefix.is_empty() {
            Path::from(key)
        } else {
            Path::from(format!("{}/{key}", self.prefix))
        }
    }
}

fn invalid(message: String) -> io::Error {
    io::Error::new(io::ErrorKind::InvalidInput, message)
}

fn failed(error: object_store::Error) -> io::Error {
    io::Error::other(error.to_string())
}

impl Storage for S3 {
    fn put_new(&self, key: &str, bytes: &[u8]) -> io::Result<bool> {
        check_key(key)?;
        let options = PutOptions {
            mode: PutMode::Create,
            ..Default::default()
        };
        let payload = PutPayload::from(bytes.to_vec());
        let path = self.path(key);
        match self
            .runtime
            .block_on(self.store.put_opts(&path, payload, options))
        {
            Ok(_) => Ok(true),
            Err(object_store::Error::AlreadyExists { .. }) => Ok(false),
            Err(error) => Err(failed(error)),
        }
    }

    fn replace(&self, key: &str, bytes: &[u8]) -> io::Result<()> {
        check_key(key)?;
        let path = self.path(key);
        let payload = PutPayload::from(bytes.to_vec());
        self.runtime
            .block_on(self.store.put(&path, payload))
            .map(|_| ())
            .map_err(failed)
    }

    fn get(&self, key: &str, max: u64) -> io::Result<Option<Vec<u8>>> {
        check_key(key)?;
        let path = self.path(key);
        self.runtime.block_on(async {
            match self.store.get(&path).await {
                Ok(result) => {
                    // The size is known from the response's head, before
                    // the body is read.
                    let size = result.meta.size;
                    if size > max {
                        return Err(io::Error::new(
                            io::ErrorKind::InvalidData,
                            format!(
                                "{} is {size} bytes, over the limit of {max} for it",
                                self.locate(key)
                            ),
                        ));
                    }
                    Ok(Some(result.bytes().await.map_err(failed)?.to_vec()))
                }
                Err(object_store::Error::NotFound { .. }) => Ok(None),
                Err(error) => Err(failed(error)),
            }
        })
    }

    fn get_range(&self, key: &str, offset: u64, len: u64) -> io::Result<Option<Vec<u8>>> {
        check_key(key)?;
        let path = self.path(key);
        let end = offset.checked_add(len).ok_or_else(|| {
            io::Error::new(io::ErrorKind::UnexpectedEof, "a range past any object")
        })?;
        self.runtime.block_on(async {
            // A range request may be answered with less than asked (or an
            // error) when it runs past the end: the size decides.
            let meta = match self.store.head(&path).await {
                Ok(meta) => meta,
                Err(object_store::Error::NotFound { .. }) => return Ok(None),
                Err(error) => return Err(failed(error)),
            };
            if end > meta.size {
                return Err(io::Error::new(
                    io::ErrorKind::UnexpectedEof,
                    format!(
                        "{}: {len} bytes at {offset} run past its end ({} bytes)",
                        self.locate(key),
                        meta.size
                    ),
                ));
            }
            if len == 0 {
                return Ok(Some(Vec::new()));
            }
            match self.store.get_range(&path, offset..end).await {
                Ok(bytes) if bytes.len() as u64 == len => Ok(Some(bytes.to_vec())),
                Ok(bytes) => Err(io::Error::new(
                    io::ErrorKind::UnexpectedEof,
                    format!(
                        "{}: asked for {len} bytes at {offset}, got {}",
                        self.locate(key),
                        bytes.len()
                    ),
                )),
                Err(object_store::Error::NotFound { .. }) => Ok(None),
                Err(error) => Err(failed(error)),
            }
        })
    }

    fn list(&self, prefix: &str) -> io::Result<Vec<String>> {
        let folder = prefix.trim_end_matches('/');
        check_key(folder)?;
        let path = self.path(folder);
        let found: Vec<object_store::ObjectMeta> = self
            .runtime
            .block_on(self.store.list(Some(&path)).try_collect())
            .map_err(failed)?;
        let strip = if self.prefix.is_empty() {
            String::new()
        } else {
            format!("{}/", self.prefix)
        };
        let mut keys: Vec<String> = found
            .into_iter()
            .filter_map(|meta| {
                let key = meta.location.as_ref().strip_prefix(&strip)?.to_string();
                let name = key.rsplit('/').next().unwrap_or("");
                (!name.starts_with('.')).then_some(key)
            })
            .collect();
        keys.sort();
        Ok(keys)
    }

    fn delete(&self, key: &str) -> io::Result<()> {
        check_key(key)?;
        let path = self.path(key);
        match self.runtime.block_on(self.store.delete(&path)) {
            Ok(()) | Err(object_store::Error::NotFound { .. }) => Ok(()),
            Err(error) => Err(failed(error)),
        }
    }

    fn lock(&self) -> io::Result<Option<std::fs::File>> {
        Ok(None)
    }

    fn locate(&self, key: &str) -> String {
        format!("s3://{}/{}", self.bucket, self.path(key))
    }
}
