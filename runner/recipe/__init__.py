"""Recipe text -> checked model -> step graph.

Strict YAML with positions (``yamlpos``), the pydantic models (``model``),
loading and checking a recipe (``load``), positioned problems (``problems``),
the graph of named steps (``graph``), input globs (``patterns``), limit bounds
in units (``quantities``), the JSON Schema and generated tables (``schema``),
the recipe diff (``diff``) and the recipe's place in git (``git``). Nothing
here reads an image.
"""
