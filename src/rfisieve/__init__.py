"""rfisieve: batch flagging of radio-frequency interference in time-frequency scans."""

__version__ = "0.1.0"
