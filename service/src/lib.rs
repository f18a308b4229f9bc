//! demefix service library: job documents, validation, provenance and the command line.
