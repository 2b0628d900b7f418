"""Everything that reads or writes files of a results folder: safe output folders and atomic
writes, tables, the time series, block sums and the summary."""
