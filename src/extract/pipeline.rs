//! Reading and mapping on two threads: this thread reads raw records (CSV records, NDJSON
//! lines) and hands them over in batches; a second thread maps them to rows; the rows come
//! back and go to the caller's sink on this thread, in file order. Mapping (cells to typed
//! values, raw text for the reject table) is most of a parse's work, so on a large extract
//! this roughly halves the time the caller's thread spends parsing. Memory stays bounded:
//! at most `DEPTH` batches are in flight, and their buffers are reused.

use std::sync::mpsc;

use super::{ExtractError, ParseError, Row};

/// Records handed to the mapping thread at a time: enough to make handing over cheap per
/// record, few enough that a batch is small (about 100 KB of CSV).
const BATCH: usize = 512;

/// Batches in flight before the reading thread waits for mapped rows.
const DEPTH: usize = 8;

/// Reads items with `read` (which fills a reused item and says whether there was one),
/// maps each batch with `map` on a second thread, and hands the rows to `sink` in order.
/// A read error is returned after the rows read before it have been delivered, as a
/// one-thread parse would; a sink error stops at once.
pub(super) fn run<T, E>(
    mut read: impl FnMut(&mut T) -> Result<bool, ExtractError>,
    fresh: impl Fn() -> T,
    map: impl Fn(&[T]) -> Vec<Row> + Sync,
    sink: &mut impl FnMut(Row) -> Result<(), E>,
) -> Result<(), ParseError<E>>
where
    T: Send,
{
    std::thread::scope(|scope| {
        let (to_mapper, batches) = mpsc::channel::<Vec<T>>();
        let (to_reader, mapped) = mpsc::channel::<(Vec<T>, Vec<Row>)>();
        let map = &map;
        let mapper = move || {
            for batch in batches {
                let rows = map(&batch);
                if to_reader.send((batch, rows)).is_err() {
                    break;
                }
            }
        };
        if let Err(err) =
            std::thread::Builder::new().name("tidemark-parse".into()).spawn_scoped(scope, mapper)
        {
            return Err(ExtractError::Read(err).into());
        }
        let mut spare: Vec<Vec<T>> = Vec::new();
        let mut in_flight = 0usize;
        let mut read_error = None;
        while read_error.is_none() {
            let mut batch = spare.pop().unwrap_or_default();
            let mut filled = 0;
            while filled < BATCH {
                if filled == batch.len() {
                    batch.push(fresh());
                }
                match read(&mut batch[filled]) {
                    Ok(true) => filled += 1,
                    Ok(false) => break,
                    Err(err) => {
                        read_error = Some(err);
                        break;
                    }
                }
            }
            let more = filled == BATCH && read_error.is_none();
            batch.truncate(filled);
            if filled > 0 {
                // The mapper only stops early when this thread has stopped listening.
                if to_mapper.send(batch).is_err() {
                    break;
                }
                in_flight += 1;
            }
            loop {
                let wait = in_flight > DEPTH || (!more && in_flight > 0);
                let received = if wait { mapped.recv().ok() } else { mapped.try_recv().ok() };
                let Some((batch, rows)) = received else { break };
                in_flight -= 1;
                for row in rows {
                    sink(row).map_err(ParseError::Sink)?;
                }
                spare.push(batch);
            }
            if !more {
                break;
            }
        }
        match read_error {
            Some(err) => Err(err.into()),
            None => Ok(()),
        }
    })
}
