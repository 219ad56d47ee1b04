//! Training of a layer stack (placeholder filled below).
