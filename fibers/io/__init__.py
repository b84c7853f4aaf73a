"""Everything that reads or writes a file lives in this package."""
