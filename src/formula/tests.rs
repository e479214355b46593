//! Unit tests of the formula module.
