"""Who owns the walkers: the scheduler talks to workers, never to contexts directly.

Only condition assignments go in and observations (energies, positions) come out, so a
worker may live in this process (here), in another process, or on another MPI rank.
"""


class SerialWorkers:
    """All walkers in this process, propagated one after another."""

    def __init__(self, walkers):
        self.walkers = list(walkers)

    @property
    def n_walkers(self):
        return len(self.walkers)

    def minimise(self):
        for walker in self.walkers:
            walker.minimise()

    def draw_velocities(self, seeds):
        for walker, seed in zip(self.walkers, seeds):
            walker.draw_velocities(seed)

    def propagate(self, n_steps):
        """Advance every walker ``n_steps``; return their observations in walker order."""
        for walker in self.walkers:
            walker.step(n_steps)
        return [walker.observe() for walker in self.walkers]

    def assign(self, conditions):
        """Give walker r the condition ``conditions[r]`` (only those that changed)."""
        for walker, condition in zip(self.walkers, conditions):
            if walker.condition.index != condition.index:
                walker.apply(condition)

    def checkpoints(self):
        return [walker.checkpoint() for walker in self.walkers]

    def restore(self, states, conditions):
        for walker, state, condition in zip(self.walkers, states, conditions):
            walker.restore(state, condition)

    def close(self):
        self.walkers.clear()
