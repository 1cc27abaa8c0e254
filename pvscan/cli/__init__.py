"""Command-line interface. Only this package talks to the terminal; the core never imports it."""
