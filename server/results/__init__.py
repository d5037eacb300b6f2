"""results: see DEVELOPERS.md for the architecture map."""
