//! Where the encoder's bytes go: straight into the file, or (when encoding
//! runs in the background) to a thread of their own that writes them.
//!
//! Copying a gigabyte of output into the kernel's page cache costs about as
//! much CPU as encoding one float column. Done on the encoding thread, it
//! stalls encoding (and the helper waiting on it) for the whole copy; on its
//! own thread it overlaps with encoding. Bytes are handed over in blocks of
//! [`BLOCK`]; at most [`QUEUED`] blocks wait, and emptied blocks come back
//! for reuse, so the memory held is bounded and not touched afresh.

use std::fs::File;
use std::io::{self, Write};
use std::sync::mpsc::{Receiver, SyncSender};
use std::thread::JoinHandle;

/// Bytes per block handed to the writing thread.
const BLOCK: usize = 4 << 20;
/// Blocks that may wait for the writing thread.
const QUEUED: usize = 2;

/// The encoder's output.
#[derive(Debug)]
pub(super) enum Sink {
    /// Written on the calling thread.
    Direct(File),
    /// Written on a thread of its own.
    Threaded(Threaded),
}

#[derive(Debug)]
pub(super) struct Threaded {
    block: Vec<u8>,
    /// `None` after [`Sink::finish`] began.
    tx: Option<SyncSender<Vec<u8>>>,
    /// Emptied blocks coming back.
    spare: Receiver<Vec<u8>>,
    handle: Option<JoinHandle<io::Result<File>>>,
}

impl Sink {
    /// A sink writing `file` on a thread of its own.
    pub(super) fn threaded(file: File) -> io::Result<Sink> {
        let (tx, rx) = std::sync::mpsc::sync_channel::<Vec<u8>>(QUEUED);
        let (back_tx, spare) = std::sync::mpsc::sync_channel::<Vec<u8>>(QUEUED + 2);
        let handle = std::thread::Builder::new().name("tagwright-file".into()).spawn(move || {
            let mut file = file;
            let mut written = 0u64;
            for mut block in rx {
                file.write_all(&block)?;
                start_writeback(&file, written, block.len() as u64);
                written += block.len() as u64;
                block.clear();
                // The sink may be gone or have enough spares; either is fine.
                let _ = back_tx.try_send(block);
            }
            Ok(file)
        })?;
        Ok(Sink::Threaded(Threaded { block: Vec::with_capacity(BLOCK), tx: Some(tx), spare, handle: Some(handle) }))
    }

    /// Writes what is left and returns the file (after the writing thread
    /// ended; its error, if it failed).
    pub(super) fn finish(self) -> io::Result<File> {
        match self {
            Sink::Direct(f) => Ok(f),
            Sink::Threaded(mut t) => {
                let sent = t.send();
                t.tx = None;
                let file = t.join();
                sent.and(file)
            }
        }
    }
}

/// Asks the kernel to start writing bytes `offset..offset + len` of `file`
/// to disk now, without waiting (Linux `sync_file_range`). Otherwise a
/// gigabyte of output sits in the page cache until the closing `fsync`,
/// which then waits for all of it (0.4 s of a 5 s run, with the processors
/// idle); started block by block, the disk writes overlap with encoding.
/// A failure is ignored: this only moves work earlier, and the `fsync` at
/// the end still reports any write error.
#[cfg(target_os = "linux")]
fn start_writeback(file: &File, offset: u64, len: u64) {
    use std::os::fd::AsRawFd;
    let (Ok(offset), Ok(len)) = (i64::try_from(offset), i64::try_from(len)) else { return };
    // SAFETY: the descriptor is open for the life of `file`; the call only
    // reads its arguments.
    unsafe {
        libc::sync_file_range(file.as_raw_fd(), offset as _, len as _, libc::SYNC_FILE_RANGE_WRITE);
    }
}

#[cfg(not(target_os = "linux"))]
fn start_writeback(_file: &File, _offset: u64, _len: u64) {}

impl Threaded {
    /// Hands the current block to the writing thread.
    fn send(&mut self) -> io::Result<()> {
        if self.block.is_empty() {
            return Ok(());
        }
        let next = self.spare.try_recv().unwrap_or_else(|_| Vec::with_capacity(BLOCK));
        let block = std::mem::replace(&mut self.block, next);
        let Some(tx) = &self.tx else { return Err(io::Error::other("the file is closed")) };
        if tx.send(block).is_err() {
            // The writing thread stopped: its error says why.
            self.tx = None;
            return Err(self.join().err().unwrap_or_else(|| io::Error::other("the file-writing thread stopped")));
        }
        Ok(())
    }

    fn join(&mut self) -> io::Result<File> {
        match self.handle.take() {
            Some(h) => h.join().unwrap_or_else(|_| Err(io::Error::other("the file-writing thread panicked"))),
            None => Err(io::Error::other("the file-writing thread already ended")),
        }
    }
}

impl Write for Sink {
    fn write(&mut self, data: &[u8]) -> io::Result<usize> {
        match self {
            Sink::Direct(f) => f.write(data),
            Sink::Threaded(t) => {
                t.block.extend_from_slice(data);
                if t.block.len() >= BLOCK {
                    t.send()?;
                }
                Ok(data.len())
            }
        }
    }

    /// Hands a partial block over; does not wait for it to be written
    /// ([`Sink::finish`] does).
    fn flush(&mut self) -> io::Result<()> {
        match self {
            Sink::Direct(f) => f.flush(),
            Sink::Threaded(_) => Ok(()),
        }
    }
}

impl Drop for Threaded {
    fn drop(&mut self) {
        // Stop the thread (pending blocks are still written; the caller
        // removes the partial file).
        self.tx = None;
        if let Some(h) = self.handle.take() {
            let _ = h.join();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn blocks_arrive_in_order_and_whole() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("s.bin");
        let mut sink = Sink::threaded(File::create(&path).unwrap()).unwrap();
        let mut want = Vec::new();
        for k in 0..3000u32 {
            let piece: Vec<u8> = (0..(k * 7919) % 20_000).map(|i| (i ^ k) as u8).collect();
            sink.write_all(&piece).unwrap();
            want.extend_from_slice(&piece);
        }
        sink.flush().unwrap();
        drop(sink.finish().unwrap());
        assert!(want.len() > 3 * BLOCK);
        assert!(std::fs::read(&path).unwrap() == want);
    }

    #[cfg(unix)]
    #[test]
    fn a_failed_write_is_reported() {
        // /dev/full fails every write with ENOSPC.
        let Ok(full) = std::fs::OpenOptions::new().write(true).open("/dev/full") else { return };
        let mut sink = Sink::threaded(full).unwrap();
        let block = vec![7u8; BLOCK];
        let mut failed = None;
        for _ in 0..(QUEUED + 4) {
            if let Err(e) = sink.write_all(&block) {
                failed = Some(e);
                break;
            }
        }
        let e = match failed {
            Some(e) => e,
            None => sink.finish().unwrap_err(),
        };
        assert!(e.to_string().to_lowercase().contains("space"), "{e}");
    }
}
