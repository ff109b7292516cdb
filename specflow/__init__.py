"""specflow: declare an instrumental-variables study once, run its whole robustness grid."""

__version__ = "0.1.0"
