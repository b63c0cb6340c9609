"""The numerical core: pure numpy and the standard library, no UI and no files."""
