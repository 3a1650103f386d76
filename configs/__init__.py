"""mnemode's Hydra config tree (shipped inside the package as ``mnemode.configs``)."""
