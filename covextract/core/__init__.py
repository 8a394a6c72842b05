"""Plain shared types with no I/O: progress events, options shared by every stage."""
