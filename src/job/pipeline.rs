//! A large batch on three threads: one parses the lines into blocks of readings, the
//! calling thread runs the plain loop ([`Lines::filter`]) over them, and one writes the
//! JSON from blocks of records. The answer's bytes are the same as on one thread.

use super::plain::{Lines, Predictions, Shape, Source};
use crate::filter::run::Run;
use crate::job::records::Records;
use crate::job::write::Writer;
use crate::job::PieceSink;
use crate::model::Reading;
use crate::problem::{Problem, ProblemKind};
use std::sync::mpsc;

/// Blocks of records in flight between the two threads (besides the one being filled).
const BLOCKS_IN_FLIGHT: usize = 3;

/// Lines per block handed from the reading thread to the filtering thread.
const READINGS_PER_BLOCK: usize = 512;

impl Lines<'_> {
    /// [`Lines::filter`] on three threads: one parses the lines into blocks of readings,
    /// this one filters them, and one writes the JSON from blocks of records; the
    /// answer's estimates come back as pieces in order. Each hand-over is a bounded
    /// channel with emptied blocks coming back, so nothing is allocated per line. Nothing
    /// is answered before the whole run has succeeded: on a failure the pieces are
    /// dropped, and the first failing line is the one reported, as on one thread.
    ///
    /// With `out`, each piece goes there as soon as it is written (and none comes back);
    /// when `out` refuses one (nobody reads the answer any more), the writing stops and
    /// the run fails at its next hand-over.
    pub(super) fn filter_overlapped(
        &self,
        run: &mut Run,
        preds: &mut Predictions<'_>,
        out: Option<&mut dyn PieceSink>,
    ) -> Result<Vec<Vec<u8>>, Problem> {
        let shape = self.shape;
        let writer = self.writer;
        std::thread::scope(|s| {
            let (full_tx, full_rx) = mpsc::sync_channel::<Records>(BLOCKS_IN_FLIGHT);
            let (empty_tx, empty_rx) = mpsc::channel::<Records>();
            for _ in 0..BLOCKS_IN_FLIGHT {
                let _ = empty_tx.send(shape.block(usize::MAX));
            }
            let written = std::thread::Builder::new()
                .name("tacit-writer".into())
                .spawn_scoped(s, move || {
                    write_blocks(writer, shape, full_rx, empty_tx, out)
                })
                .map_err(|e| thread_failed("writing", e))?;
            let (parsed_tx, parsed_rx) = mpsc::sync_channel::<ReadingBlock>(BLOCKS_IN_FLIGHT);
            let (spent_tx, spent_rx) = mpsc::channel::<ReadingBlock>();
            for _ in 0..=BLOCKS_IN_FLIGHT {
                let _ = spent_tx.send(ReadingBlock::default());
            }
            let parsed = std::thread::Builder::new()
                .name("tacit-reader".into())
                .spawn_scoped(s, move || self.parse_blocks(parsed_tx, spent_rx))
                .map_err(|e| thread_failed("reading", e))?;
            let mut source = Parsed {
                full: parsed_rx,
                spent: spent_tx,
                block: ReadingBlock::default(),
                pos: 0,
            };
            let mut block = shape.block(usize::MAX);
            let filtered = self.filter(run, preds, &mut source, &mut block, |b| {
                // The writer hands every block back unless it has died; its panic is
                // raised again below.
                let empty = empty_rx.recv().map_err(|_| thread_gone())?;
                full_tx
                    .send(std::mem::replace(b, empty))
                    .map_err(|_| thread_gone())
            });
            // Closing the channels stops the other two threads if this one stopped early.
            drop((source, full_tx, empty_rx));
            let parts = match (written.join(), parsed.join()) {
                (Ok(parts), Ok(())) => parts,
                (Err(panic), _) | (_, Err(panic)) => std::panic::resume_unwind(panic),
            };
            filtered.map(|()| parts)
        })
    }

    /// The reading thread: parse the lines in order into blocks; a line that fails ends
    /// its block and the thread, the block carrying the line's problem.
    fn parse_blocks(
        &self,
        full: mpsc::SyncSender<ReadingBlock>,
        spent: mpsc::Receiver<ReadingBlock>,
    ) {
        let mut i = 0;
        while i < self.lines.len() {
            let Ok(mut b) = spent.recv() else { return };
            b.len = 0;
            b.error = None;
            while b.len < READINGS_PER_BLOCK && i < self.lines.len() {
                if b.readings.len() == b.len {
                    b.readings.push(Reading::default());
                }
                if let Err(p) = self.parse_line(i, &mut b.readings[b.len]) {
                    b.error = Some(p);
                    i = self.lines.len();
                    break;
                }
                b.len += 1;
                i += 1;
            }
            if full.send(b).is_err() {
                return;
            }
        }
    }
}

/// The writing thread: each full block becomes one piece of the answer, sized from the
/// bytes per estimate seen so far so that it is not copied while it grows.
fn write_blocks(
    writer: &Writer,
    shape: Shape,
    full: mpsc::Receiver<Records>,
    empty: mpsc::Sender<Records>,
    mut out: Option<&mut dyn PieceSink>,
) -> Vec<Vec<u8>> {
    let mut parts = Vec::new();
    let mut per_step = shape.guess_bytes();
    let mut first = true;
    for mut block in full {
        let mut buf = Vec::with_capacity(64 + per_step * block.len());
        block.write(writer, &mut buf, first);
        first = false;
        // A quarter more than the largest seen: the numbers' lengths vary a little.
        per_step = per_step.max(buf.len().div_ceil(block.len()) * 5 / 4);
        match out.as_mut() {
            Some(o) => {
                if !o.send(buf) {
                    // Nobody reads the answer: stop; the filtering thread's next
                    // hand-over fails.
                    return parts;
                }
            }
            None => parts.push(buf),
        }
        block.clear();
        // The filtering thread may have stopped (a failed line); then the block is dropped.
        let _ = empty.send(block);
    }
    parts
}

fn thread_gone() -> Problem {
    Problem::new(
        ProblemKind::Internal,
        "a reading or writing thread stopped early",
    )
}

fn thread_failed(what: &str, e: std::io::Error) -> Problem {
    Problem::new(
        ProblemKind::Internal,
        format!("could not start the {what} thread: {e}"),
    )
}

/// Parsed lines handed over by the reading thread.
#[derive(Default)]
struct ReadingBlock {
    /// Reused from block to block, so their buffers are allocated once.
    readings: Vec<Reading>,
    /// Readings filled in this block.
    len: usize,
    /// The problem of the line after the last one filled, which ended the reading.
    error: Option<Problem>,
}

/// The filtering thread's end of the reading thread's channels.
struct Parsed {
    full: mpsc::Receiver<ReadingBlock>,
    spent: mpsc::Sender<ReadingBlock>,
    block: ReadingBlock,
    pos: usize,
}

impl Source for Parsed {
    fn next(&mut self, _i: usize) -> Result<&Reading, Problem> {
        loop {
            if self.pos < self.block.len {
                self.pos += 1;
                return Ok(&self.block.readings[self.pos - 1]);
            }
            if let Some(p) = self.block.error.take() {
                return Err(p);
            }
            let next = self.full.recv().map_err(|_| thread_gone())?;
            let spent = std::mem::replace(&mut self.block, next);
            // The reading thread may have finished; then the block is simply dropped.
            let _ = self.spent.send(spent);
            self.pos = 0;
        }
    }
}
