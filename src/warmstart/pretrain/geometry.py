"""Where a view's pixels came from: exact coordinate maps between a patch and its augmented views.

A view is made (:mod:`.augment`) by cropping and resizing, then flips, quarter turns and an
optional affine warp. Each step samples its input at a known position, so a point of a view maps
to one point of the patch, and back, without guessing from features. Dense objectives use this
to pair the locations of two views that show the same place of the patch.

Coordinates are ``(y, x)`` fractions of the image side: pixel ``i`` of ``n`` has its centre at
``(i + 0.5) / n``; 0 and 1 are the outer edges.
"""
from __future__ import annotations

import torch

from .augment import ViewParams

__all__ = ["view_to_patch", "patch_to_view", "inside", "matched_points"]


def _affine(points: torch.Tensor, theta: torch.Tensor) -> torch.Tensor:
    """Apply (B, 2, 3) affine matrices in ``affine_grid``'s normalized (x, y) frame to (y, x) fractions."""
    xy = torch.stack([points[..., 1], points[..., 0]], -1) * 2 - 1  # (B, K, 2) in [-1, 1], x first
    out = xy @ theta[:, :, :2].transpose(1, 2) + theta[:, None, :, 2]
    out = (out + 1) / 2
    return torch.stack([out[..., 1], out[..., 0]], -1)


def _invert_affine(theta: torch.Tensor) -> torch.Tensor:
    a = theta[:, :, :2]
    inv = torch.linalg.inv(a)
    return torch.cat([inv, -(inv @ theta[:, :, 2:])], dim=2)


def _turn(points: torch.Tensor, turns: torch.Tensor, inverse: bool) -> torch.Tensor:
    """``torch.rot90(x, k, dims=(-2, -1))`` samples its input at ``(x, 1 - y)`` per turn."""
    y, x = points[..., 0], points[..., 1]
    for k in (1, 2, 3):
        sel = (turns == k)[:, None]
        yy, xx = y, x
        for _ in range(k):
            yy, xx = (1 - xx, yy) if inverse else (xx, 1 - yy)
        y, x = torch.where(sel, yy, y), torch.where(sel, xx, x)
    return torch.stack([y, x], -1)


def _flip(points: torch.Tensor, p: ViewParams) -> torch.Tensor:
    y = torch.where(p.flip_y[:, None], 1 - points[..., 0], points[..., 0])
    x = torch.where(p.flip_x[:, None], 1 - points[..., 1], points[..., 1])
    return torch.stack([y, x], -1)


def view_to_patch(points: torch.Tensor, p: ViewParams) -> torch.Tensor:
    """Patch coordinates of points given in view coordinates.

    Parameters
    ----------
    points : (B, K, 2) tensor
        ``(y, x)`` fractions of the view.
    p : ViewParams
        The view's parameters (one per sample).

    Returns
    -------
    (B, K, 2) tensor
        ``(y, x)`` fractions of the patch the view was drawn from.
    """
    q = _affine(points, p.affine.to(points.dtype))
    q = _turn(q, p.turns, inverse=False)
    q = _flip(q, p)
    top, left, h, w = p.crop.to(points.dtype).unbind(-1)
    return torch.stack([top[:, None] + h[:, None] * q[..., 0], left[:, None] + w[:, None] * q[..., 1]], -1)


def patch_to_view(points: torch.Tensor, p: ViewParams) -> torch.Tensor:
    """View coordinates of points given in patch coordinates (the inverse of :func:`view_to_patch`).

    Points outside the view's crop come out outside [0, 1]; see :func:`inside`.
    """
    top, left, h, w = p.crop.to(points.dtype).unbind(-1)
    q = torch.stack([(points[..., 0] - top[:, None]) / h[:, None], (points[..., 1] - left[:, None]) / w[:, None]], -1)
    q = _flip(q, p)
    q = _turn(q, p.turns, inverse=True)
    return _affine(q, _invert_affine(p.affine.to(points.dtype)))


def inside(points: torch.Tensor, margin: float = 0.0) -> torch.Tensor:
    """(B, K) mask of points within the image, at least ``margin`` (a fraction) from its edges."""
    return ((points >= margin) & (points <= 1 - margin)).all(-1)


def matched_points(p1: ViewParams, p2: ViewParams, grid: int, margin: float = 0.0) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """The centres of a ``grid`` x ``grid`` lattice of view 1, and where they lie in view 2.

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
        ``(B, grid * grid, 2)`` view-1 and view-2 coordinates of the same patch points, and the
        ``(B, grid * grid)`` mask of those that view 2 shows.
    """
    b = p1.crop.shape[0]
    c = (torch.arange(grid, dtype=torch.float32, device=p1.crop.device) + 0.5) / grid
    yy, xx = torch.meshgrid(c, c, indexing="ij")
    pts1 = torch.stack([yy.flatten(), xx.flatten()], -1).expand(b, -1, -1).contiguous()
    pts2 = patch_to_view(view_to_patch(pts1, p1), p2)
    return pts1, pts2, inside(pts2, margin)
