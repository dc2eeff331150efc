//! The demo scenario: Fernhill Water, a fictional regional water utility, sorts incoming customer
//! letters into six trays with a text classifier. Its model is accurate but overconfident, so
//! letters it is "sure" about are auto-routed too often to the wrong tray.
//!
//! [`generate`] draws letters deterministically: the true tray y from fixed shares, then six
//! scores z = a·e_y + N(0, I). With Gaussian class-conditionals of equal covariance the true
//! posterior is softmax(a·z + ln prior); the "model" reports OVERCONFIDENCE·a·z (too sharp, and
//! blind to the tray shares), the kind of miscalibration temperature scaling repairs.

mod scenario;

pub use scenario::{
    calibration_set, fit_demo_map, generate, traffic_set, write_data, Letters, CALIBRATION_ROWS,
    CLASS_NAMES, CONFIDENCE, HOLDOUT, MODEL, TARGET_ACCURACY, TRAFFIC_ROWS,
};
