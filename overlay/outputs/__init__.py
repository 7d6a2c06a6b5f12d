"""Writing a run: outputs staged and moved in together, pictures, reports, the drawing sheet and styles."""
