//! Test support that imports nothing from modalmap: an independent forward model of
//! element maps ([`forward`]).

#![allow(dead_code)]

pub mod forward;
