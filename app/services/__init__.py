"""Use cases between the pages, the commands and the core: each loads its data, calls analysis/ and returns plain results."""
