"""Names the record, the calibration kinds and the renderings share."""

#: Header of ``calibration_table.csv`` (docs/sensor_calibration.md); part of the file format.
CALIBRATION_TABLE_HEADER = "resistance_ohm,temperature_K,expanded_uncertainty_K"

#: How a sensor curve's degree was chosen, in words, by the record's ``degree_criterion``.
CRITERION_NAMES = {
    "aicc": "AICc (corrected Akaike information criterion)",
    "loo": "leave-one-out cross-validation",
    "fixed degree": "the run manifest (fixed degree)",
}
