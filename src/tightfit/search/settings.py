"""Settings of one `tightfit search` call (torch-free, so the command line can build them cheaply)."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Optional

from tightfit.search.evolution import EvolutionSettings


@dataclass(frozen=True)
class SearchSettings:
    population: int = 16
    evaluations: int = 96         # distinct candidates per budget, initial population included
    sample_size: int = 6
    seed: int = 0
    top: int = 4                  # candidates measured directly per budget
    val_images: int = 0           # cap on validation images per evaluation (0 = the whole split)
    rescore: int = 8              # with val_images: the best N candidates per budget are scored again on the
    #                               whole split before measurement, so a cheap ranking does not decide the pick
    backend: str = "onnxruntime"  # validation pass: "onnxruntime" (fast) or "torch"
    slack: Optional[float] = None # search up to budget x (1 + slack) when picks are measured here;
    #                               None: the predictor's leave-one-out error, clamped to 5-25 %
    drift_check: bool = False     # re-measure the table's calibration subnets before each budget (this host only);
    #                               off by default: on the benchmark VM its reading did not predict the candidates'
    #                               measured/predicted ratio (docs/measurements.md), the corrected second search does
    guard: Optional[float] = None # a measured pick must fit budget x (1 - guard) so QA's later measurement fits too;
    #                               None: each candidate's own guard from the spread of its repeats
    finetune_steps: int = 0       # fine-tune each pick from its inherited weights, distilling from the largest
    #                               (tightfit.train.finetune); 0: ship the inherited weights
    finetune_lr: float = 0.1      # the fine-tune's peak learning rate (cosine to zero)
    confirm: bool = True          # after a device's last budget, measure its picks once more, pool the repeats of
    #                               both windows and choose again where a pick no longer keeps its guard (confirm.py)

    def evolution(self) -> EvolutionSettings:
        return EvolutionSettings(population=self.population, sample_size=min(self.sample_size, self.population),
                                 evaluations=max(self.evaluations, 1), seed=self.seed)
