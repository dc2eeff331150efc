//! The decision log: every answered request, and every outcome (true label) people send back,
//! joined by request id and written to an append-only, size-rotated journal.
//!
//! The request path only hands a record to a bounded channel with `try_send`: when the writer
//! falls behind (a slow or full disk) records are dropped and counted, and requests never wait.
//! One writer thread owns the table of recent decisions and the journal files, so nothing is
//! locked. An outcome is acknowledged after its line is written (and, with `fsync`, after the
//! file is synced), so an acknowledged outcome survives a crash of the process (with `fsync`,
//! of the machine).

mod file;
mod writer;

pub use file::{read_journal, JournalRead, Record};
pub use writer::{
    Decided, DecisionLog, JournalOptions, JournalStats, MapKey, OutcomeAck, OutcomeError,
    SpecLookup,
};
