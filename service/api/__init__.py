"""One blueprint per resource; ``formats`` holds the shared table responses."""
