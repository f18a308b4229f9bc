//! Well-mixed references: the Moran and haploid Wright-Fisher fixation probabilities of an
//! unstructured population of the same total size.
//!
//! OWNER: approximations helper.
