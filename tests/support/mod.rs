//! Test support that imports nothing from modalmap: an independent forward model of
//! element maps ([`forward`]) and the invented scenarios the tests run it on
//! ([`scenarios`]).

#![allow(dead_code)]

pub mod forward;
pub mod scenarios;
