"""The on-disk store: manifest, layout, atomic writes, writer and verified reader."""
