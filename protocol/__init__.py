"""tetherloop wire protocol v1: pure, sans-I/O codec and the message table."""
