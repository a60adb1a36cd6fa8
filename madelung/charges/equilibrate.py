def equilibrate(*a, **k): raise NotImplementedError
class EquilibrationResult: pass
