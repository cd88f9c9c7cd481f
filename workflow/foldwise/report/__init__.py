"""The study report: figures and the page."""
