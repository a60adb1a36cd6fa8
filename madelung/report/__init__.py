"""Reports: text, JSON and the files the commands write."""
