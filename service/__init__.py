"""sorbrank service: Flask API, command-line interface. May import worker; never the reverse."""
