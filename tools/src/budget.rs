//! Error budget (being written).
