//! All integration tests, built into one test binary.

// Committed fixtures are exactly what the generator writes today.
mod fixtures;
