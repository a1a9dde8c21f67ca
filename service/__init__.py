"""diastolic-sr: grades LV diastolic function from echo measurement SRs (decision support only)."""

__version__ = "0.1.0"
SOFTWARE_NAME = "diastolic-sr"
