"""One module per tab of the stand console."""
