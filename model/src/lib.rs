//! vigil-model: pure computation for crossed random-effects models (work in progress).
