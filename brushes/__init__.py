"""pliant's engine: elastic brushes from regularized Kelvinlets.

F. de Goes and D. L. James, "Regularized Kelvinlets: Sculpting Brushes based on Fundamental
Solutions of Elasticity", ACM Trans. Graph. 36(4), 2017.

    import brushes
    g = brushes.Grab(center=(0, 1, 0), radius=0.3, move=(0.1, 0, 0))
    posed = g.apply(points)                 # flow, fold-free, volume kept at poisson 0.5

This is a visual posing tool: the elasticity is an idealized model for shaping geometry, not an
engineering, structural or medical analysis.
"""
from brushes import flow, registry  # flow registers itself behind Brush.apply
from brushes.brush import Brush, Grab, Pinch, Scale, Twist
from brushes.dynamic import Dynamic, dynamic
from brushes.flow import FlowStats
from brushes.handles import Handles
from brushes.mirror import Mirrored, mirror
from brushes.quality import format_quality, quality
from brushes.recipe import Recipe, RecipeError, Stroke, load_recipe, parse_recipe, recipe_to_dict, save_recipe

__all__ = ["Brush", "FlowStats", "Grab", "Twist", "Scale", "Pinch", "Handles", "Mirrored", "mirror", "quality", "format_quality",
           "registry", "Recipe", "RecipeError", "Stroke", "load_recipe", "parse_recipe", "recipe_to_dict",
           "save_recipe"]
