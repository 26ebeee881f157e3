"""The on-disk format: layout, writer, reader, keyframes. Nothing else in nbkit touches files."""
