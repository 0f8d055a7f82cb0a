"""One record's analysis: readers and input checks, conditioning, spectrum, forcing and order tracking,
tachometer pulses, line detection and the line-or-bump test, growth within a record, quality and ISO
severity; ``pipeline.analyze_record`` runs them in order."""
