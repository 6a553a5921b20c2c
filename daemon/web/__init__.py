"""The HTTP(S) server and the status page: plots, SVG, sparkline history."""
