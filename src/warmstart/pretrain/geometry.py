"""Where a view's pixels came from: exact coordinate maps between a patch and its augmented views.

A view is made (:mod:`.augment`) by cropping and resizing, then flips, quarter turns and an
optional affine warp. Each step samples its input at a known position, so a point of a view maps
to one point of the patch, and back, without guessing from features. Dense objectives use this
to pair the locations of two views that show the same place of the patch.

Coordinates are ``(y, x)`` fractions of the image side (``(z, y, x)`` for 3-D views of cubes):
pixel ``i`` of ``n`` has its centre at ``(i + 0.5) / n``; 0 and 1 are the outer edges.
"""
from __future__ import annotations

import torch

from .augment import ViewParams

__all__ = ["view_to_patch", "patch_to_view", "inside", "matched_points"]


def _affine(points: torch.Tensor, theta: torch.Tensor) -> torch.Tensor:
    """Apply (B, n, n + 1) affine matrices in ``affine_grid``'s normalized (x, y[, z]) frame to
    ((z,) y, x) fractions."""
    n = points.shape[-1]
    xy = points.flip(-1) * 2 - 1  # (B, K, n) in [-1, 1], x first
    out = xy @ theta[:, :, :n].transpose(1, 2) + theta[:, None, :, n]
    return ((out + 1) / 2).flip(-1)


def _invert_affine(theta: torch.Tensor) -> torch.Tensor:
    n = theta.shape[1]
    inv = torch.linalg.inv(theta[:, :, :n])
    return torch.cat([inv, -(inv @ theta[:, :, n:])], dim=2)


def _turn(points: torch.Tensor, turns: torch.Tensor | None, inverse: bool, plane: tuple[int, int] | None = None) -> torch.Tensor:
    """``torch.rot90(x, k, dims=(A, B))`` samples its input at ``(b, 1 - a)`` per turn, for the
    coordinates (a, b) of the plane's two axes (default the last two: (y, x))."""
    if turns is None:
        return points
    n = points.shape[-1]
    ia, ib = plane if plane is not None else (n - 2, n - 1)
    a, b = points[..., ia], points[..., ib]
    for k in (1, 2, 3):
        sel = (turns == k)[:, None]
        aa, bb = a, b
        for _ in range(k):
            aa, bb = (1 - bb, aa) if inverse else (bb, 1 - aa)
        a, b = torch.where(sel, aa, a), torch.where(sel, bb, b)
    out = points.clone()
    out[..., ia], out[..., ib] = a, b
    return out


# Quarter-turn planes as coordinate indices of (z, y, x) points, in the order they are applied.
_PLANES_3D = (("turns", (1, 2)), ("turns_zx", (0, 2)), ("turns_zy", (0, 1)))


def _turns(points: torch.Tensor, p: ViewParams, inverse: bool) -> torch.Tensor:
    if points.shape[-1] == 2:
        return _turn(points, p.turns, inverse)
    planes = _PLANES_3D if inverse else _PLANES_3D[::-1]  # view -> patch undoes the last turn first
    for name, plane in planes:
        points = _turn(points, getattr(p, name), inverse, plane)
    return points


def _flip(points: torch.Tensor, p: ViewParams) -> torch.Tensor:
    n = points.shape[-1]
    out = points.clone()
    flips = [(n - 1, p.flip_x), (n - 2, p.flip_y)] + ([(0, p.flip_z)] if n == 3 and p.flip_z is not None else [])
    for i, mask in flips:
        out[..., i] = torch.where(mask[:, None], 1 - points[..., i], points[..., i])
    return out


def view_to_patch(points: torch.Tensor, p: ViewParams) -> torch.Tensor:
    """Patch coordinates of points given in view coordinates.

    Parameters
    ----------
    points : (B, K, n) tensor
        ``(y, x)`` (or ``(z, y, x)``) fractions of the view.
    p : ViewParams
        The view's parameters (one per sample).

    Returns
    -------
    (B, K, n) tensor
        The same points as fractions of the patch the view was drawn from.
    """
    n = points.shape[-1]
    q = _affine(points, p.affine.to(points.dtype))
    q = _turns(q, p, inverse=False)
    q = _flip(q, p)
    crop = p.crop.to(points.dtype)
    return crop[:, None, :n] + crop[:, None, n:] * q


def patch_to_view(points: torch.Tensor, p: ViewParams) -> torch.Tensor:
    """View coordinates of points given in patch coordinates (the inverse of :func:`view_to_patch`).

    Points outside the view's crop come out outside [0, 1]; see :func:`inside`.
    """
    n = points.shape[-1]
    crop = p.crop.to(points.dtype)
    q = (points - crop[:, None, :n]) / crop[:, None, n:]
    q = _flip(q, p)
    q = _turns(q, p, inverse=True)
    return _affine(q, _invert_affine(p.affine.to(points.dtype)))


def inside(points: torch.Tensor, margin: float = 0.0) -> torch.Tensor:
    """(B, K) mask of points within the image, at least ``margin`` (a fraction) from its edges."""
    return ((points >= margin) & (points <= 1 - margin)).all(-1)


def matched_points(p1: ViewParams, p2: ViewParams, grid: int, margin: float = 0.0) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """The centres of a ``grid`` x ``grid`` (x ``grid`` in 3-D) lattice of view 1, and where they
    lie in view 2.

    Parameters
    ----------
    p1, p2 : ViewParams
        The two views of the same batch.
    grid : int
        Lattice side (the side of the feature map being matched: its cell centres).
    margin : float
        Points closer than this to view 2's edge count as outside.

    Returns
    -------
    (points1, points2, valid)
        ``(B, grid ** n, n)`` view-1 and view-2 coordinates of the same patch points, and the
        ``(B, grid ** n)`` mask of those that view 2 shows.
    """
    b, n = p1.crop.shape[0], p1.spatial_dims
    c = (torch.arange(grid, dtype=torch.float32, device=p1.crop.device) + 0.5) / grid
    mesh = torch.meshgrid(*([c] * n), indexing="ij")
    pts1 = torch.stack([m.flatten() for m in mesh], -1).expand(b, -1, -1).contiguous()
    pts2 = patch_to_view(view_to_patch(pts1, p1), p2)
    return pts1, pts2, inside(pts2, margin)
