"""Built-in node kinds, one module per family.

Importing a module registers its kinds with :data:`streamq.engine.registry.registry`.
"""
