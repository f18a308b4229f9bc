//! First-order weak-selection expansion of fixation probabilities.
//!
//! OWNER: approximations helper.
