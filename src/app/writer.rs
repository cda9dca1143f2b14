//! The one writer: a dedicated thread owns the `Store` (and with it the writer lock) and runs
//! jobs sent to it one at a time, so every write is serialised and a blocking SQLite
//! transaction never stalls the async runtime. SQLite connections are `Send` but not
//! `Sync`, which is exactly this shape.

use std::sync::mpsc;
use std::thread::JoinHandle;

use anyhow::{Result, anyhow};
use tokio::sync::oneshot;

use crate::store::Store;

type Job = Box<dyn FnOnce(&mut Store) + Send>;

/// A handle to the writer thread; cheap to clone.
#[derive(Debug, Clone)]
pub struct Writer {
    jobs: mpsc::Sender<Job>,
}

/// Joins the writer thread once every `Writer` handle is gone.
#[derive(Debug)]
pub struct WriterThread(JoinHandle<()>);

impl WriterThread {
    pub fn join(self) {
        let _ = self.0.join();
    }
}

/// Starts the writer thread with the store it will own.
pub fn start(mut store: Store) -> Result<(Writer, WriterThread)> {
    let (jobs, queue) = mpsc::channel::<Job>();
    let handle = std::thread::Builder::new().name("tidemark-writer".into()).spawn(move || {
        while let Ok(job) = queue.recv() {
            job(&mut store);
        }
    })?;
    Ok((Writer { jobs }, WriterThread(handle)))
}

impl Writer {
    /// Runs `job` on the writer thread and waits for its result.
    pub async fn run<T: Send + 'static>(
        &self,
        job: impl FnOnce(&mut Store) -> T + Send + 'static,
    ) -> Result<T> {
        let (reply, answer) = oneshot::channel();
        self.jobs
            .send(Box::new(move |store: &mut Store| {
                let _ = reply.send(job(store));
            }))
            .map_err(|_| anyhow!("the writer thread has stopped"))?;
        answer.await.map_err(|_| anyhow!("the writer thread stopped during a job"))
    }

    /// Runs `job` on the writer thread and blocks this (non-async) thread for its result:
    /// for the post-snapshot pipeline, which runs on a blocking thread of its own.
    pub fn run_blocking<T: Send + 'static>(
        &self,
        job: impl FnOnce(&mut Store) -> T + Send + 'static,
    ) -> Result<T> {
        let (reply, answer) = mpsc::sync_channel(1);
        self.jobs
            .send(Box::new(move |store: &mut Store| {
                let _ = reply.send(job(store));
            }))
            .map_err(|_| anyhow!("the writer thread has stopped"))?;
        answer.recv().map_err(|_| anyhow!("the writer thread stopped during a job"))
    }
}
