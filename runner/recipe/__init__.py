"""Recipe text -> checked model -> step graph.

Strict YAML with positions (``yamlpos``), the pydantic models and loading
(``model``), the graph of named steps (``graph``), limit bounds in units
(``quantities``), the JSON Schema (``schema``) and the recipe diff (``diff``).
Nothing here reads an image.
"""
