"""From measurements to findings: local reference and normalisation, defect patterns and
severity, power and energy loss, ranking."""
