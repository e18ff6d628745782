"""Built-in qcflag rule sets (TOML), shipped inside the package as ``qcflag.rulesets``."""
