"""Pure numerics of the per-channel fit y ≈ a·g(b·x + c) + d: observers, closed forms, variable projection, parameter scaling."""
