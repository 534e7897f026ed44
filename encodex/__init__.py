"""encodex."""
