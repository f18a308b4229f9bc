//! Binomial intervals and quantiles used to summarise ensembles.
//!
//! OWNER: ensemble helper.
