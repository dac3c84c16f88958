"""Models learned in the session: the place model, its file, its cross-validation and readiness, the movement model and calibration."""
