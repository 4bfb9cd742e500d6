"""Page templates of the progression viewer and the reader study (shipped as package data)."""
