"""Static HTML reports (``html``) and their SVG charts (``svg``)."""
