"""Where records come from: recorded files (replay); the interface any source implements."""
