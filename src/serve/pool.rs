//! A small pool of read-only connections, so that an API request does not pay for opening
//! the store (and checking its schema) each time. Connections are only ever read-only
//! `Reader`s; a request takes one on a blocking thread and gives it back when done.

use std::path::PathBuf;
use std::sync::Mutex;

use crate::store::{Reader, StoreError};

/// Idle connections kept: about the number of requests that run at once on this machine's
/// blocking threads; more would only hold file handles.
const MAX_IDLE: usize = 16;

#[derive(Debug)]
pub struct ReaderPool {
    path: PathBuf,
    idle: Mutex<Vec<Reader>>,
}

impl ReaderPool {
    pub fn new(path: PathBuf) -> ReaderPool {
        ReaderPool { path, idle: Mutex::new(Vec::new()) }
    }

    pub fn path(&self) -> &std::path::Path {
        &self.path
    }

    /// Runs `f` with a read-only connection (blocking: call from `spawn_blocking`).
    pub fn with<T>(&self, f: impl FnOnce(&Reader) -> T) -> Result<T, StoreError> {
        // A poisoned lock only means another request panicked while holding it; the list
        // of idle connections is still valid.
        let pooled = self.idle.lock().unwrap_or_else(|p| p.into_inner()).pop();
        let reader = match pooled {
            Some(reader) => reader,
            None => Reader::open(&self.path)?,
        };
        let out = f(&reader);
        let mut idle = self.idle.lock().unwrap_or_else(|p| p.into_inner());
        if idle.len() < MAX_IDLE {
            idle.push(reader);
        }
        Ok(out)
    }
}
