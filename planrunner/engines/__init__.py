"""Pure numerical engines: numpy/scipy only, no files, clock, printing, pandas or pydantic."""
