"""slicetime: audit, repair and correct fMRI slice timing across BIDS-style datasets."""

__version__ = "0.1.0"
