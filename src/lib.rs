//! klgauge
