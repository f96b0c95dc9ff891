"""The site file (TOML) read and checked into model objects: `config.load_site`."""
