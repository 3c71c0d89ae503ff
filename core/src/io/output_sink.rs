//! Where the encoder's bytes go: straight into the file, or (when encoding
//! runs in the background) to a thread of their own that writes them.
//!
//! Copying a gigabyte of output into the kernel's page cache costs about as
//! much CPU as encoding one float column. Done on the encoding thread, it
//! stalls encoding (and the helper waiting on it) for the whole copy; on its
//! own thread it overlaps with encoding. Bytes are handed over in blocks of
//! [`BLOCK`]; at most [`QUEUED`] blocks wait, and emptied blocks come back
//! for reuse, so the memory held is bounded and not touched afresh.
//!
//! The writing thread goes further where the file system allows it (Linux,
//! `O_DIRECT`): whole blocks go from one reused, page-aligned buffer to the
//! disk without the page cache, so the kernel neither copies the gigabyte
//! nor takes fresh pages for it (on the 2,000-tag bench that copy was 15% of
//! the run's processor time). The last partial block is written through
//! the cache. Where uncached writes are refused, every write goes through
//! the cache, and the kernel is asked to start writing each block to disk
//! at once (`sync_file_range`), so the closing `fsync` does not wait for
//! all of it.

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
            let mut disk = Disk::new(file);
            for mut block in rx {
                disk.write(&block)?;
                block.clear();
                // The sink may be gone or have enough spares; either is fine.
                let _ = back_tx.try_send(block);
            }
            disk.finish()
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

/// The writing thread's file: uncached whole blocks where the file system
/// takes them, else cached writes with write-behind (module doc). Every
/// write is positional, so a block can be written again at its place.
struct Disk {
    file: File,
    /// Bytes written (all at their final place).
    written: u64,
    /// The aligned buffer of the block being gathered for an uncached
    /// write; `None` when writing through the cache.
    staging: Option<Staging>,
}

/// A page of the aligned staging buffer.
#[derive(Clone, Copy)]
#[repr(C, align(4096))]
struct Page([u8; PAGE]);

/// Bytes per page: uncached writes need buffers, offsets and lengths
/// aligned to the device's block size; a page is a multiple of it.
const PAGE: usize = 4096;

struct Staging {
    pages: Vec<Page>,
    len: usize,
}

impl Staging {
    fn new() -> Self {
        Staging { pages: vec![Page([0; PAGE]); BLOCK / PAGE], len: 0 }
    }

    fn bytes(&mut self) -> &mut [u8] {
        let n = self.pages.len() * PAGE;
        // SAFETY: `Page` is a `repr(C)` byte array whose size equals its
        // alignment, so the pages are `n` contiguous, initialised bytes,
        // borrowed mutably with `self`.
        unsafe { std::slice::from_raw_parts_mut(self.pages.as_mut_ptr().cast::<u8>(), n) }
    }
}

impl Disk {
    fn new(file: File) -> Disk {
        let staging = set_uncached(&file, true).then(Staging::new);
        Disk { file, written: 0, staging }
    }

    fn write(&mut self, mut data: &[u8]) -> io::Result<()> {
        while let Some(st) = self.staging.as_mut() {
            if data.is_empty() {
                return Ok(());
            }
            let at = st.len;
            let n = (BLOCK - at).min(data.len());
            st.bytes()[at..at + n].copy_from_slice(&data[..n]);
            st.len += n;
            data = &data[n..];
            if st.len < BLOCK {
                continue;
            }
            match write_all_at(&self.file, st.bytes(), self.written) {
                Ok(()) => {
                    st.len = 0;
                    self.written += BLOCK as u64;
                }
                // Refused (the file system's alignment, or no support after
                // all): this block is written again at its place, and it and
                // the rest go through the cache. A real failure (a full
                // disk) fails there too and is reported.
                Err(_) => {
                    if let Some(mut st) = self.staging.take() {
                        set_uncached(&self.file, false);
                        self.cached(st.bytes())?;
                    }
                }
            }
        }
        self.cached(data)
    }

    /// A write through the page cache, its disk write started at once.
    fn cached(&mut self, data: &[u8]) -> io::Result<()> {
        write_all_at(&self.file, data, self.written)?;
        start_writeback(&self.file, self.written, data.len() as u64);
        self.written += data.len() as u64;
        Ok(())
    }

    /// Writes the partial block (through the cache) and returns the file.
    fn finish(mut self) -> io::Result<File> {
        if let Some(mut st) = self.staging.take() {
            set_uncached(&self.file, false);
            let len = st.len;
            self.cached(&st.bytes()[..len])?;
        }
        Ok(self.file)
    }
}

#[cfg(unix)]
fn write_all_at(file: &File, data: &[u8], offset: u64) -> io::Result<()> {
    std::os::unix::fs::FileExt::write_all_at(file, data, offset)
}

#[cfg(not(unix))]
fn write_all_at(mut file: &File, data: &[u8], offset: u64) -> io::Result<()> {
    use std::io::{Seek, SeekFrom};
    file.seek(SeekFrom::Start(offset))?;
    file.write_all(data)
}

/// Turns uncached writes (`O_DIRECT`) on or off; false when the file
/// system (or the platform) does not allow it.
#[cfg(target_os = "linux")]
fn set_uncached(file: &File, on: bool) -> bool {
    use std::os::fd::AsRawFd;
    let fd = file.as_raw_fd();
    // SAFETY: reads and sets the status flags of a descriptor open for the
    // life of `file`.
    unsafe {
        let flags = libc::fcntl(fd, libc::F_GETFL);
        if flags < 0 {
            return false;
        }
        let flags = if on { flags | libc::O_DIRECT } else { flags & !libc::O_DIRECT };
        libc::fcntl(fd, libc::F_SETFL, flags) == 0
    }
}

#[cfg(not(target_os = "linux"))]
fn set_uncached(_file: &File, _on: bool) -> bool {
    false
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

    /// Writes pieces of odd sizes through a threaded sink into a file in
    /// `dir` and reads them back.
    fn round_trip_in(dir: &std::path::Path) {
        let path = dir.join("s.bin");
        let mut sink = Sink::threaded(File::create(&path).unwrap()).unwrap();
        let mut want = Vec::new();
        for k in 0..3000u32 {
            let piece: Vec<u8> = (0..(k * 7919) % 20_000).map(|i| (i ^ k) as u8).collect();
            sink.write_all(&piece).unwrap();
            want.extend_from_slice(&piece);
        }
        sink.flush().unwrap();
        drop(sink.finish().unwrap());
        assert!(want.len() > 3 * BLOCK && want.len() % PAGE != 0);
        assert!(std::fs::read(&path).unwrap() == want, "in {}", dir.display());
    }

    #[test]
    fn blocks_arrive_in_order_and_whole() {
        // Uncached where the temporary directory's file system allows it.
        round_trip_in(tempfile::tempdir().unwrap().path());
    }

    #[test]
    fn blocks_arrive_whole_through_the_cache_too() {
        // A file system that refuses uncached writes (tmpfs, on older
        // kernels) and one where they are off: both go through the cache.
        if let Ok(dir) = tempfile::tempdir_in("/dev/shm") {
            round_trip_in(dir.path());
        }
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("c.bin");
        let mut disk = Disk::new(File::create(&path).unwrap());
        if disk.staging.take().is_some() {
            assert!(set_uncached(&disk.file, false));
        }
        let want: Vec<u8> = (0..3 * BLOCK + 123).map(|i| (i % 251) as u8).collect();
        for piece in want.chunks(BLOCK / 3 + 7) {
            disk.write(piece).unwrap();
        }
        drop(disk.finish().unwrap());
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
