"""The on-disk format: layout, writer, reader, keyframes. Only this package reads or writes a recording."""
