"""Exit codes of every ``posteriord`` command (the README's table is this one)."""

EXIT_OK = 0
EXIT_USAGE = 2
EXIT_CONFIG = 3
EXIT_RUNTIME = 4
EXIT_LOCKED = 5      # another process holds the state folder's lock
EXIT_CORRUPT = 6     # damaged or unusable state folder, on_corruption = "refuse"
EXIT_DURABILITY = 7  # a write or fsync of the state folder failed
