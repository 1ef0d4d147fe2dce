"""Reference data from outside the project (published tables, worked examples), one module per source."""
