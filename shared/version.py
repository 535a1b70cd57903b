"""The engine's version, recorded with every stored fit."""

ENGINE_VERSION = "0.1.0"
