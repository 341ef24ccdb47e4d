"""elmon's test suite (a package, so that ``tests.*`` helpers are found before any
third-party ``tests`` package installed in site-packages)."""
