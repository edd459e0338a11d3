//! Object storage (feature `s3`): `s3://bucket/key` paths through DataFusion's object_store.
//!
//! [`EnvObjectStores`] is an object-store registry that builds the store of an `s3://` bucket
//! the first time a path in it is used, from this process's AWS environment variables
//! (`AWS_ACCESS_KEY_ID`, `AWS_SECRET_ACCESS_KEY`, `AWS_REGION`, `AWS_ENDPOINT_URL` for an
//! S3-compatible server, `AWS_ALLOW_HTTP=true` for one without TLS on a private network, ...).
//! Credentials therefore never travel in plans or session settings. Local paths and stores
//! registered by hand keep working as with DataFusion's default registry.

use std::sync::Arc;

use datafusion::error::{DataFusionError, Result};
use datafusion::execution::object_store::{DefaultObjectStoreRegistry, ObjectStoreRegistry};
use object_store::ObjectStore;
use object_store::aws::AmazonS3Builder;
use url::Url;

/// The registry: DataFusion's default, plus `s3://` stores built on first use.
#[derive(Debug, Default)]
pub struct EnvObjectStores {
    inner: DefaultObjectStoreRegistry,
}

impl EnvObjectStores {
    pub fn new() -> Self {
        EnvObjectStores::default()
    }
}

impl ObjectStoreRegistry for EnvObjectStores {
    fn register_store(&self, url: &Url, store: Arc<dyn ObjectStore>) -> Option<Arc<dyn ObjectStore>> {
        self.inner.register_store(url, store)
    }

    fn deregister_store(&self, url: &Url) -> Result<Arc<dyn ObjectStore>> {
        self.inner.deregister_store(url)
    }

    fn get_store(&self, url: &Url) -> Result<Arc<dyn ObjectStore>> {
        if let Ok(store) = self.inner.get_store(url) {
            return Ok(store);
        }
        if url.scheme() != "s3" {
            return self.inner.get_store(url);
        }
        let bucket = url.host_str().unwrap_or_default();
        if bucket.is_empty() {
            return Err(DataFusionError::Plan(format!(
                "{url}: an s3:// path needs a bucket name"
            )));
        }
        let store = AmazonS3Builder::from_env()
            .with_bucket_name(bucket)
            .build()
            .map_err(|e| {
                DataFusionError::Plan(format!(
                    "s3://{bucket}: cannot set up the store from the AWS environment variables: {e}"
                ))
            })?;
        let store: Arc<dyn ObjectStore> = Arc::new(store);
        let base =
            Url::parse(&format!("s3://{bucket}")).map_err(|e| DataFusionError::Plan(format!("s3://{bucket}: {e}")))?;
        self.inner.register_store(&base, store.clone());
        Ok(store)
    }
}

/// Whether `path` names object storage rather than a local file.
pub fn is_remote(path: &str) -> bool {
    path.to_ascii_lowercase().starts_with("s3://")
}
