//! The library's file I/O: labelled data folders ([`data`]), model files
//! ([`models`]: bounded reads that name a wrong file), durable file
//! operations ([`durable`]: atomic writes, synced folders, moves that never
//! overwrite, bounded reads) and the logs as maintenance reads them
//! ([`logs`]: the detection log files in order, streamed line by line).
//!
//! Everything else in the library is pure; the daemon's own files (the
//! lock, the detection log, the inbox) live with the daemon and build on
//! [`durable`].

pub mod data;
pub mod durable;
pub mod logs;
pub mod models;
