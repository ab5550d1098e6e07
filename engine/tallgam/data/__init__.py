"""Data in: every source becomes one DuckDB relation (:mod:`.sources`), is profiled in one
aggregate pass (:mod:`.profile`), and is read through the model's SQL select list
(:mod:`.inputs`); a binned fit keeps a scratch copy of its coded rows (:mod:`.scratch`)."""
