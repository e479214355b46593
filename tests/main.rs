//! Every integration test in one binary (one link, one run).

mod estimation;
