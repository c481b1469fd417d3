"""The test battery, grading against spec sheets, and reports."""
