//! Data input (being written).
