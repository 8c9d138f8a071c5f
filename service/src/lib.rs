//! vigil-service (work in progress).
