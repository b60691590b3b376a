"""Drawing for the page and for print: figures built from ``physics`` results."""
