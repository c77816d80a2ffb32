"""Service shell of arxwatch: pure processing stages, their adapters and the command line."""
