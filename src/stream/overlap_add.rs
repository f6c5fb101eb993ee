//! (filled in by the streaming work)
