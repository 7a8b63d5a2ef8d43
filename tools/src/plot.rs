//! SVG plots (being written).
