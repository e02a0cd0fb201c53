"""Views of results: the terminal (rich) and, later, files."""
