"""Reading case files and writing text: case sections, units in messages, summaries, the C header, map tables."""
