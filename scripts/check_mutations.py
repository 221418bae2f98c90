"""Apply plausible bugs one at a time to a copy of the code and check that the named tests catch each.

    .venv/bin/python scripts/check_mutations.py            # every mutation, prints the kill count
    .venv/bin/python scripts/check_mutations.py --list     # the table only
    .venv/bin/python scripts/check_mutations.py --only finetune   # the mutations of one file (or description)

A mutation is (file under src/tightfit, exact text, replacement, tests that must fail). Each runs in a
fresh temporary copy of src/ and tests/ (the checkout is never touched), with PYTHONPATH pointing at
the copy. Exit 0 when every mutation is killed, 1 otherwise, 2 when a mutation's text is not found
(the table has drifted from the code: update it; tests/test_mutation_table.py checks the same in
the suite, in seconds). Grow the table with the code: a new rule in the search, the protocol or
training gets its mutation here.
"""
from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
RULES = "tests/test_method_rules.py"
FINETUNE = "tests/test_finetune_rules.py"
CONFIRM = "tests/test_confirm_rules.py"
SEARCH_CONFIRM = "tests/test_search_confirm.py"
MEASUREMENT = "tests/test_ondevice_measurement.py"
PICK = "tests/test_search_pick.py"


@dataclass(frozen=True)
class Mutation:
    what: str
    file: str
    text: str
    replacement: str
    tests: tuple[str, ...]


MUTATIONS = (
    Mutation("distillation switched off (labels for every subnet)", "train/sandwich.py",
             "w = cfg.distill_weight if cfg.distill and teacher is not None else 0.0", "w = 0.0",
             (f"{RULES}::test_sandwich_gradient_is_label_loss_of_largest_plus_distillation_of_the_others",)),
    Mutation("mixed teacher loss with the weights swapped", "train/sandwich.py",
             "loss = w * loss + (1 - w) * F.cross_entropy", "loss = (1 - w) * loss + w * F.cross_entropy",
             ("tests/test_targets.py::test_mixed_loss_gradient_matches_the_rule_written_out_by_hand",)),
    Mutation("band keeps subnets below its bottom", "train/targets.py",
             "if low_ms <= predict(s) <= high_ms:", "if predict(s) <= high_ms:",
             ("tests/test_targets.py::test_band_members_are_exactly_the_sampled_subnets_predicted_inside_the_band",)),
    Mutation("alpha-divergence without its 1 / (a (a - 1)) scale", "train/sandwich.py",
             "return (torch.logsumexp(a * log_p + (1 - a) * log_q, 1).exp() - 1) / (a * (a - 1))",
             "return (torch.logsumexp(a * log_p + (1 - a) * log_q, 1).exp() - 1)",
             ("tests/test_targets.py::test_alpha_divergence_matches_its_closed_forms",)),
    Mutation("alpha distillation takes the smaller divergence", "train/sandwich.py",
             "return torch.maximum(*(alpha_divergence", "return torch.minimum(*(alpha_divergence",
             ("tests/test_targets.py::test_alpha_distillation_takes_the_larger_of_its_two_divergences",)),
    Mutation("teacher behind still teaches", "train/sandwich.py",
             'if w > 0 and cfg.distill_when == "ahead" and', 'if False and',
             ("tests/test_targets.py::test_a_teacher_not_ahead_on_the_batch_teaches_nothing",)),
    Mutation("mean teacher weights the new weights by the decay", "train/teacher.py",
             "a.mul_(self.decay).add_(p.detach(), alpha=1 - self.decay)",
             "a.mul_(1 - self.decay).add_(p.detach(), alpha=self.decay)",
             ("tests/test_targets.py::test_mean_teacher_averages_weights_by_the_rule_and_copies_batchnorm_statistics",)),
    Mutation("best-of-k trains the highest-loss draw", "train/targets.py",
             "return candidates[min(range(len(candidates)), key=losses.__getitem__)]",
             "return candidates[max(range(len(candidates)), key=losses.__getitem__)]",
             ("tests/test_targets.py::test_best_of_k_trains_the_draw_with_the_lowest_loss_first_on_ties",)),
    Mutation("every step draws from the first band", "train/targets.py",
             "band = bands[(step * per_step + j) % len(bands)]", "band = bands[0]",
             ("tests/test_targets.py::test_band_draws_come_from_their_band_take_bands_in_turn_and_depend_only_on_seed_and_step",)),
    Mutation("elite challenger wins ties", "train/targets.py",
             "if fresh in elite or loss_of(fresh) >= loss_of(member):",
             "if fresh in elite or loss_of(fresh) > loss_of(member):",
             ("tests/test_target_elite.py::test_challenge_trains_and_keeps_the_lower_loss_and_the_member_on_ties",)),
    Mutation("elite slot from the step, not the band's own turns", "train/targets.py",
             "slot = turn // len(bands) % len(elite[name])", "slot = step % len(elite[name])",
             ("tests/test_target_elite.py::test_round_robin_visits_every_slot_of_each_band_in_turn",)),
    Mutation("a resumed run starts from the first elite", "train/loop.py",
             'if state is not None and "target_elite" in state:', "if False:",
             ("tests/test_target_elite.py::test_resume_with_an_elite_is_bit_identical_and_continues_the_elite",)),
    Mutation("soft targets without softmax", "train/sandwich.py",
             "p = F.softmax(teacher_logits / t, 1)", "p = teacher_logits / t",
             (f"{RULES}::test_sandwich_gradient_is_label_loss_of_largest_plus_distillation_of_the_others",)),
    Mutation("teacher recomputed from each subnet", "train/sandwich.py",
             "        if i == 0 and given is None:\n            teacher =", "        if given is None:\n            teacher =",
             (f"{RULES}::test_sandwich_gradient_is_label_loss_of_largest_plus_distillation_of_the_others",)),
    Mutation("distillation temperature without the T^2 scale", "train/sandwich.py",
             "return per_row.mean() * t * t", "return per_row.mean()",
             (f"{RULES}::test_kl_distillation_with_temperature_is_the_hand_computed_divergence",)),
    Mutation("lr floor ignored", "train/sandwich.py",
             "base * (end + (1 - end) * 0.5", "base * (0 + (1 - end) * 0.5",
             ("tests/test_train.py::test_schedule_can_end_at_a_fraction_of_the_base_lr",)),
    Mutation("zero init also on blocks without a skip", "train/initialise.py",
             "if block.stride == 1 and set(widths_in) & set(options[i + 1]):", "if block.stride == 1:",
             ("tests/test_train.py::test_zero_init_residual_zeroes_bn3_gamma_of_exactly_the_skip_blocks",)),
    Mutation("a first block's skip judged by its own stage's widths", "train/initialise.py",
             "widths_in = options[i + 1] if j else options[i]", "widths_in = options[i + 1]",
             ("tests/test_train.py::test_zero_init_residual_zeroes_bn3_gamma_of_exactly_the_skip_blocks",)),
    Mutation("weight decay on BatchNorm and biases", "train/sandwich.py",
             'p.ndim <= 1 or "transforms" in name', 'p.ndim < 1 or "transforms" in name',
             (f"{RULES}::test_weight_decay_shrinks_weights_by_lr_wd_w_and_spares_norm_bias_and_transforms",)),
    Mutation("weight decay on BatchNorm's scale (biases spared by name)", "train/sandwich.py",
             'p.ndim <= 1 or "transforms" in name', 'name.endswith("bias") or "transforms" in name',
             (f"{RULES}::test_weight_decay_shrinks_weights_by_lr_wd_w_and_spares_norm_bias_and_transforms",)),
    Mutation("weight decay on the kernel-transform matrices", "train/sandwich.py",
             'p.ndim <= 1 or "transforms" in name', "p.ndim <= 1",
             (f"{RULES}::test_weight_decay_shrinks_weights_by_lr_wd_w_and_spares_norm_bias_and_transforms",)),
    Mutation("SGD without Nesterov's look-ahead", "train/sandwich.py",
             "lr=cfg.lr, momentum=cfg.momentum, nesterov=cfg.momentum > 0)", "lr=cfg.lr, momentum=cfg.momentum)",
             (f"{RULES}::test_weight_decay_shrinks_weights_by_lr_wd_w_and_spares_norm_bias_and_transforms",)),
    Mutation("sandwich draw ignores the seed", "train/sandwich.py",
             "random.Random(seed * 7_919 + step)", "random.Random(step)",
             (f"{RULES}::test_sandwich_draws_depend_on_seed_and_step_and_differ_within_a_step",)),
    Mutation("recalibration with a moving average", "model/elastic.py",
             "factor = 1.0 / float(self.num_batches_tracked) if self.momentum is None else self.momentum",
             "factor = self.momentum or 0.1",
             (f"{RULES}::test_recalibrated_batchnorm_is_the_exact_average_and_touches_only_active_channels",)),
    Mutation("statistics written to a copy", "model/elastic.py",
             "F.batch_norm(x, self.running_mean[:chs], self.running_var[:chs],",
             "F.batch_norm(x, self.running_mean[:chs].clone(), self.running_var[:chs].clone(),",
             (f"{RULES}::test_recalibrated_batchnorm_is_the_exact_average_and_touches_only_active_channels",)),
    Mutation("trailing instead of leading channels", "model/elastic.py",
             "return self.weight[:out_channels, :in_channels]", "return self.weight[-out_channels:, :in_channels]",
             (f"{RULES}::test_pointwise_uses_the_leading_channels",)),
    Mutation("normalize without the mean", "data/dataset.py",
             "(x.permute(0, 3, 1, 2).float() - m) / s", "x.permute(0, 3, 1, 2).float() / s",
             (f"{RULES}::test_normalize_subtracts_the_mean_then_divides_by_the_std",)),
    Mutation("verdict loosened to 1.5 x the budget", "ondevice/measurement.py",
             "return self.figure_ms <= budget_ms * (1.0 - guard)", "return self.figure_ms <= 1.5 * budget_ms * (1.0 - guard)",
             (f"{RULES}::test_budget_boundary",)),
    Mutation("verdict strict at the budget itself", "ondevice/measurement.py",
             "return self.figure_ms <= budget_ms * (1.0 - guard)", "return self.figure_ms < budget_ms * (1.0 - guard)",
             (f"{RULES}::test_budget_boundary",)),
    Mutation("the fit rule ignores the guard it is given", "ondevice/measurement.py",
             "return self.figure_ms <= budget_ms * (1.0 - guard)", "return self.figure_ms <= budget_ms",
             (f"{MEASUREMENT}::test_a_figure_fits_the_budget_less_its_guard",)),
    Mutation("budget use inverted", "ondevice/measurement.py",
             "round(self.figure_ms / budget_ms, 4)", "round(budget_ms / self.figure_ms, 4)",
             (f"{MEASUREMENT}::test_budget_use_is_the_figure_over_the_budget",)),
    Mutation("guard margin dropped", "search/choice_rule.py",
             "return t.measured.fits(budget_ms, guard_of(t, fixed))", "return t.measured.fits(budget_ms)",
             ("tests/test_search_choose.py::test_pick_leaves_the_guard_margin_when_a_candidate_can",)),
    Mutation("measured/predicted as a mean", "search/choice_rule.py",
             "float(np.median(r)) if r else None", "float(np.mean(r)) if r else None",
             ("tests/test_search_choose.py::test_choice_ratio_is_the_median_over_measured_candidates",)),
    Mutation("validation images taken from the official test set", "data/dataset.py",
             "t(np.ascontiguousarray(x[val]))", "t(np.ascontiguousarray(tx[:len(val)]))",
             ("tests/test_data_loaders.py::test_fashion_mnist_splits_validation_from_train_and_test_is_the_official_test",)),
    Mutation("input size dropped from the space hash", "model/space.py",
             '"in_channels": in_channels, "image_size": image_size}', '"in_channels": in_channels}',
             (f"{RULES}::test_space_hash_tells_input_shapes_apart",)),
    Mutation("leave-one-out error computed in-sample", "latency/predict.py",
             "a, b = _fit(kind, x[keep], y[keep])", "a, b = _fit(kind, x, y)",
             (f"{RULES}::test_calibration_reports_its_leave_one_out_error_in_percent",)),
    Mutation("leave-one-out error as a fraction, not percent", "latency/predict.py",
             "return 100.0 * float(np.mean(errs))", "return float(np.mean(errs))",
             (f"{RULES}::test_calibration_reports_its_leave_one_out_error_in_percent",)),
    Mutation("verify ignores the manifest's percentile", "ondevice/verify.py",
             'changes: dict[str, Any] = {"percentile": float(e.manifest["budget"]["percentile"])}',
             "changes: dict[str, Any] = {}",
             (f"{RULES}::test_verify_judges_at_the_manifest_percentile",)),
    Mutation("measured-ratio filter removed after a miss", "search/choice_rule.py",
             "(ratio is None or c.latency_ms * ratio <= expected)", "True",
             ("tests/test_search_choose.py::test_after_a_miss_only_candidates_that_should_fit_at_the_measured_ratio_are_tried",)),
    Mutation("the smallest subnet is never tried", "search/choice_rule.py",
             "pool = [] if last.key in done else [last]", "pool = []",
             ("tests/test_search_choose.py::test_the_fallback_subnet_is_tried_when_nothing_ranked_is_left",)),
    Mutation("slowest instead of fastest when nothing fits", "search/choice_rule.py",
             "return Choice(min(tried,", "return Choice(max(tried,",
             ("tests/test_search_choose.py::test_when_nothing_fits_the_fastest_measured_is_returned_and_flagged",)),
    Mutation("the top few measured instead of rungs", "search/choice_rule.py",
             "tried += measure(rungs(pool, top, RUNG_BOTTOM * expected / (ratio or 1.0), tie), len(tried))",
             "tried += measure(pool[:top], len(tried))",
             ("tests/test_search_choose.py::test_a_miss_at_the_top_rung_falls_to_the_next_rung_not_to_the_smallest",)),
    Mutation("rungs spaced linearly in the wrong direction", "search/choice_rule.py",
             "limits = [ceiling * (bottom / ceiling) ** (i / max(1, top - 1)) for i in range(top)]",
             "limits = [ceiling * (bottom / ceiling) ** (1 - i / max(1, top - 1)) for i in range(top)]",
             ("tests/test_search_choose.py::test_rungs_span_the_band_from_the_most_preferred_down",)),
    Mutation("front order reversed", "search/evolution.py",
             "return [c for c in ranked if c.key in front] + [c for c in ranked if c.key not in front]",
             "return [c for c in ranked if c.key not in front] + [c for c in ranked if c.key in front]",
             ("tests/test_search_choose.py::test_front_candidates_come_first_most_accurate_first",)),
    Mutation("no corrected second search (unconditional break)", "search/driver.py",
             "            if again is None:\n                break", "            break",
             ("tests/test_search_driver.py::test_a_pick_far_under_budget_earns_one_corrected_search_with_half_the_evaluations",)),
    Mutation("corrected second search with the full evaluations", "search/driver.py",
             "evaluations=max(settings.population, settings.evaluations // 2)",
             "evaluations=max(settings.population, settings.evaluations)",
             ("tests/test_search_driver.py::test_a_pick_far_under_budget_earns_one_corrected_search_with_half_the_evaluations",)),
    Mutation("corrected search seeded with the candidates already seen", "search/driver.py",
             "seeds=seen if attempt == 0 else ())", "seeds=seen)",
             ("tests/test_search_driver.py::test_the_corrected_search_starts_unseeded_so_its_evaluations_are_fresh",)),
    Mutation("corrected search blind to the guard the candidates needed", "search/correction.py",
             "usable = budget_ms * (1 - guard) / ratio", "usable = budget_ms * (1 - 0.05) / ratio",
             ("tests/test_search_driver.py::test_corrected_limit_only_for_a_verified_pick_far_under_budget",)),
    Mutation("a pick fallen back to the smallest is not searched lower", "search/correction.py",
             "    if fell_back:\n        usable = min(", "    if False:\n        usable = min(",
             ("tests/test_search_driver.py::test_corrected_limit_only_for_a_verified_pick_far_under_budget",)),
    Mutation("a corrected search centred on a guard wider than the budget", "search/correction.py",
             "or pick.use() >= UNDER_USE or guard >= NOISE_GUARD:", "or pick.use() >= UNDER_USE:",
             ("tests/test_search_driver.py::test_corrected_limit_only_for_a_verified_pick_far_under_budget",)),
    Mutation("corrected search centred on the pick's own guard", "search/correction.py",
             "typical = None if pick.guard is None else pick.guard.typical",
             "typical = None if pick.guard is None else pick.guard.share",
             ("tests/test_search_driver.py::test_a_corrected_search_centres_on_the_guard_its_candidates_needed",)),
    Mutation("the choice blind to ties", "search/choice_rule.py",
             "return max((t for t in tried if t.cand.fitness >= best - tie)",
             "return max((t for t in tried if t.cand.fitness >= best)",
             ("tests/test_search_choose.py::test_of_candidates_tied_with_the_most_accurate_the_one_using_more_budget_is_measured_first_and_picked",)),
    Mutation("a rung takes the most accurate under its limit, blind to ties", "search/choice_rule.py",
             "chosen.append(tied_slowest(below, tie))", "chosen.append(below[0])",
             ("tests/test_search_choose.py::test_rungs_span_the_band_from_the_most_preferred_down",)),
    Mutation("the tie as a binomial variance, not its standard error", "search/choice_rule.py",
             "return 100.0 * math.sqrt(p * (1.0 - p) / images)", "return 100.0 * p * (1.0 - p) / images",
             ("tests/test_search_choose.py::test_the_tie_is_one_standard_error_of_the_best_score",)),
    Mutation("alpha distillation with an unbounded density ratio", "train/sandwich.py",
             "log_q = log_p + (log_q - log_p).clamp(-ALPHA_LOG_RATIO, ALPHA_LOG_RATIO)", "log_q = log_q",
             ("tests/test_targets.py::test_alpha_distillation_stays_finite_where_the_teacher_gives_a_class_almost_nothing",)),
    Mutation("squeeze-excite on trailing channels", "model/elastic.py",
             "self.reduce.weight[:sq, :chs]", "self.reduce.weight[-sq:, :chs]",
             (f"{RULES}::test_sliced_block_with_squeeze_excite_equals_torchvision_layers_loaded_with_leading_slices",)),
    Mutation("smaller kernel from the corner, not the centre", "model/elastic.py",
             "start = (bigger - k) // 2", "start = 0",
             (f"{RULES}::test_sliced_block_with_squeeze_excite_equals_torchvision_layers_loaded_with_leading_slices",
              f"{RULES}::test_recalibration_through_a_block_equals_the_depthwise_output_mean_computed_by_hand")),
    Mutation("block recalibrated with a moving average", "model/elastic.py",
             "factor = 1.0 / float(self.num_batches_tracked) if self.momentum is None else self.momentum",
             "factor = self.momentum or 0.1",
             (f"{RULES}::test_recalibration_through_a_block_equals_the_depthwise_output_mean_computed_by_hand",)),
    Mutation("session ignores the protocol's thread count", "ondevice/timing.py",
             "    opts.intra_op_num_threads = protocol.threads\n", "",
             ("tests/test_verify.py::test_sessions_run_with_the_protocol_thread_count",)),
    Mutation("verify drops the --threads override", "ondevice/verify.py",
             'changes["threads"] = threads', "pass",
             ("tests/test_verify.py::test_verify_hands_the_override_thread_count_to_the_measurement",)),
    Mutation("a measuring failure exits 0", "ondevice/verify.py",
             "        return 1\n    except KeyboardInterrupt", "        return 0\n    except KeyboardInterrupt",
             ("tests/test_verify.py::test_a_measuring_failure_is_never_a_pass_and_writes_no_verdict",)),
    Mutation("figure from one repeat's runs instead of the pooled runs", "ondevice/repeats.py",
             'pooled_ms = np.concatenate([np.asarray(s["times_ms"], dtype=np.float64) for s in summaries])',
             'pooled_ms = np.asarray(summaries[len(summaries) // 2]["times_ms"], dtype=np.float64)',
             ("tests/test_ondevice_repeats.py::test_pooled_figure_keeps_a_state_that_only_some_repeats_caught",)),
    Mutation("guard without Student's t", "ondevice/repeats.py",
             "return max(MIN_GUARD, t * s * math.sqrt(1.0 / n + 1.0 / m) / figure)",
             "return max(MIN_GUARD, s * math.sqrt(1.0 / n + 1.0 / m) / figure)",
             ("tests/test_ondevice_repeats.py::test_guard_is_the_one_sided_95_percent_bound_on_a_later_pooled_figure",)),
    Mutation("guard assumes the later measurement has as many repeats", "ondevice/repeats.py",
             "m = n if later is None else later", "m = n",
             ("tests/test_ondevice_repeats.py::test_guard_of_ten_repeats_against_a_later_five_still_covers_95_percent",)),
    Mutation("a candidate's own guard ignored", "search/choice_rule.py",
             "own = measured.guard", "own = None",
             ("tests/test_search_choose.py::test_each_candidate_keeps_its_own_measured_guard",)),
    Mutation("search exits 0 with an unverified pick", "search/commands.py",
             'return 0 if all(r["verified"] for r in rows) else 3', "return 0",
             ("tests/test_search_driver.py::test_search_exit_codes_tell_ci_what_happened",)),
    Mutation("report's QA cell inverted", "report/page.py",
             "{'PASS' if qa.get('pass') else 'MISS'}", "{'MISS' if qa.get('pass') else 'PASS'}",
             ("tests/test_report.py::test_picks_table_cells_follow_each_pick_and_verdict",)),
    Mutation("report's fits cell inverted", "report/page.py",
             '"yes" if p.get("fits") else "NO"', '"NO" if p.get("fits") else "yes"',
             ("tests/test_report.py::test_picks_table_cells_follow_each_pick_and_verdict",)),
    # the fine-tune of picks (train/finetune.py)
    Mutation("fine-tune taught by the middle subnet", "train/finetune.py",
             "inherited_net(run, run.recipe.space.largest(), calib)", "inherited_net(run, run.recipe.space.middle(), calib)",
             (f"{FINETUNE}::test_the_first_step_distils_from_the_recalibrated_frozen_largest_at_the_recipes_temperature",)),
    Mutation("fine-tune teacher left in training mode", "train/finetune.py",
             "run.recipe.space.largest(), calib).eval()", "run.recipe.space.largest(), calib).train()",
             (f"{FINETUNE}::test_the_first_step_distils_from_the_recalibrated_frozen_largest_at_the_recipes_temperature",)),
    Mutation("fine-tune teacher's BatchNorm not recalibrated", "train/finetune.py",
             "        recalibrate_bn(run.supernet, calib)\n        return extract_subnet(run.supernet, subnet)",
             "        return extract_subnet(run.supernet, subnet)",
             (f"{FINETUNE}::test_the_first_step_distils_from_the_recalibrated_frozen_largest_at_the_recipes_temperature",)),
    Mutation("fine-tune on the labels instead of the teacher", "train/finetune.py",
             "loss = distill_loss(net(x), target, cfg.distill_loss, cfg.distill_temperature)",
             "loss = torch.nn.functional.cross_entropy(net(x), y)",
             (f"{FINETUNE}::test_the_first_step_distils_from_the_recalibrated_frozen_largest_at_the_recipes_temperature",)),
    Mutation("fine-tune ignores the distillation temperature", "train/finetune.py",
             "target, cfg.distill_loss, cfg.distill_temperature)", "target, cfg.distill_loss)",
             (f"{FINETUNE}::test_the_first_step_distils_from_the_recalibrated_frozen_largest_at_the_recipes_temperature",)),
    Mutation("fine-tune ignores the distillation loss kind", "train/finetune.py",
             "target, cfg.distill_loss, cfg.distill_temperature)", 'target, "soft_ce", cfg.distill_temperature)',
             (f"{FINETUNE}::test_the_first_step_distils_from_the_recalibrated_frozen_largest_at_the_recipes_temperature",)),
    Mutation("fine-tune without weight decay", "train/finetune.py",
             "param_groups(net, cfg.weight_decay)", "param_groups(net, 0.0)",
             (f"{FINETUNE}::test_the_optimizer_is_the_recipes_nesterov_sgd_without_decay_on_norm_and_bias",)),
    Mutation("fine-tune decays norm and bias parameters", "train/finetune.py",
             "param_groups(net, cfg.weight_decay)", '[{"params": list(net.parameters()), "weight_decay": cfg.weight_decay}]',
             (f"{FINETUNE}::test_the_optimizer_is_the_recipes_nesterov_sgd_without_decay_on_norm_and_bias",)),
    Mutation("fine-tune without Nesterov's look-ahead", "train/finetune.py",
             "momentum=cfg.momentum,\n                          nesterov=cfg.momentum > 0)", "momentum=cfg.momentum)",
             (f"{FINETUNE}::test_the_optimizer_is_the_recipes_nesterov_sgd_without_decay_on_norm_and_bias",)),
    Mutation("fine-tune at a constant learning rate", "train/finetune.py",
             'g["lr"] = cosine_lr(step, settings.steps, settings.lr)', 'g["lr"] = settings.lr',
             (f"{FINETUNE}::test_the_learning_rate_falls_by_a_cosine_from_the_peak_to_zero_over_exactly_the_steps",)),
    Mutation("fine-tune learning rate falls linearly", "train/finetune.py",
             "return peak * 0.5 * (1 + math.cos(math.pi * step / max(1, steps)))", "return peak * (1 - step / max(1, steps))",
             (f"{FINETUNE}::test_the_learning_rate_falls_by_a_cosine_from_the_peak_to_zero_over_exactly_the_steps",)),
    Mutation("fine-tune schedule one step ahead", "train/finetune.py",
             "cosine_lr(step, settings.steps, settings.lr)", "cosine_lr(step + 1, settings.steps, settings.lr)",
             (f"{FINETUNE}::test_the_learning_rate_falls_by_a_cosine_from_the_peak_to_zero_over_exactly_the_steps",)),
    Mutation("fine-tune takes one step too many", "train/finetune.py",
             "if step == settings.steps:", "if step > settings.steps:",
             (f"{FINETUNE}::test_the_learning_rate_falls_by_a_cosine_from_the_peak_to_zero_over_exactly_the_steps",)),
    Mutation("fine-tune replays the supernet's batch order", "train/finetune.py",
             "run.recipe.seed + SEED_OFFSET, epoch)", "run.recipe.seed, epoch)",
             (f"{FINETUNE}::test_the_batches_are_the_recipes_in_an_order_of_their_own_reshuffled_each_epoch_and_reproducible",)),
    Mutation("fine-tune repeats its first epoch's order", "train/finetune.py",
             "        epoch += 1\n    recalibrate_bn(net, calib)", "    recalibrate_bn(net, calib)",
             (f"{FINETUNE}::test_the_batches_are_the_recipes_in_an_order_of_their_own_reshuffled_each_epoch_and_reproducible",)),
    Mutation("fine-tuned pick not recalibrated", "train/finetune.py",
             "    recalibrate_bn(net, calib)\n    net.eval()", "    net.eval()",
             (f"{FINETUNE}::test_after_the_steps_every_batchnorm_holds_the_exact_average_over_the_calibration_batches",)),
    Mutation("fine-tuned pick handed back in training mode", "train/finetune.py",
             "    net.eval()\n    return {", "    return {",
             (f"{FINETUNE}::test_after_the_steps_every_batchnorm_holds_the_exact_average_over_the_calibration_batches",)),
    Mutation("taking a pick out changes the supernet's statistics", "train/finetune.py",
             "    with preserved_bn_stats(run.supernet):", "    if True:",
             (f"{FINETUNE}::test_taking_out_a_pick_and_its_teacher_leaves_the_supernet_as_it_was",)),
    # the confirmation of a device's picks (search/confirm.py) and the choice made again (driver.py, choose.py)
    Mutation("confirmation measures unverified picks too", "search/confirm.py",
             "todo = [p for p in picks if p.measurement is not None and str(p.export_dir) in ctx.pick_runs]",
             "todo = [p for p in picks if str(p.export_dir) in ctx.pick_runs]",
             (f"{CONFIRM}::test_only_verified_picks_chosen_here_are_measured_again_with_the_protocol_they_were_chosen_on",)),
    Mutation("second window measured on the table's protocol as it is", "search/confirm.py",
             "protocol = verification_protocol(table.protocol)", "protocol = Protocol.from_dict(table.protocol)",
             (f"{CONFIRM}::test_only_verified_picks_chosen_here_are_measured_again_with_the_protocol_they_were_chosen_on",)),
    Mutation("pooled figure from the second window only", "search/confirm.py",
             "pooled = combine_repeats(first.runs + later, protocol)", "pooled = combine_repeats(later, protocol)",
             (f"{CONFIRM}::test_each_window_and_the_pool_are_the_tables_percentile_of_their_own_runs",)),
    Mutation("second window's figure taken over both windows", "search/confirm.py",
             "later_ms=combine_repeats(later, protocol)", "later_ms=combine_repeats(first.runs + later, protocol)",
             (f"{CONFIRM}::test_each_window_and_the_pool_are_the_tables_percentile_of_their_own_runs",)),
    Mutation("first window's figure taken from the second", "search/confirm.py",
             "first_ms=combine_repeats(first.runs, protocol)", "first_ms=combine_repeats(later, protocol)",
             (f"{CONFIRM}::test_each_window_and_the_pool_are_the_tables_percentile_of_their_own_runs",)),
    Mutation("pooled repeats counted from the second window only", "search/confirm.py",
             "repeats=len(first.runs) + len(later)", "repeats=len(later)",
             (f"{CONFIRM}::test_each_window_and_the_pool_are_the_tables_percentile_of_their_own_runs",)),
    Mutation("manifest's prediction dropped", "export/pick.py",
             "pick.protocol.to_dict(), pick.predicted_ms, note", "pick.protocol.to_dict(), None, note",
             (f"{CONFIRM}::test_each_window_and_the_pool_are_the_tables_percentile_of_their_own_runs",)),
    Mutation("a confirmed pick keeps the first window's figures", "search/confirm.py",
             "replace(pick, measurement=pooled,", "replace(pick, measurement=pick.measurement,",
             (f"{SEARCH_CONFIRM}::test_a_pick_that_fit_in_a_fast_window_is_over_budget_when_the_machine_slowed_and_is_said_so",)),
    Mutation("time since the choice on another clock", "search/confirm.py",
             "time.time() - first.at", "time.perf_counter() - first.at",
             (f"{CONFIRM}::test_the_time_between_the_windows_is_wall_clock_time_since_the_choice",)),
    Mutation("confirmation checks the budget, not the budget less the guard", "search/confirm.py",
             "keeps = pooled.fits(pick.budget_ms, share)", "keeps = pooled.fits(pick.budget_ms)",
             (f"{CONFIRM}::test_a_pick_keeps_its_guard_under_budget_less_guard_and_fits_under_the_budget_itself",)),
    Mutation("confirmed verdict is the guard check", "search/confirm.py",
             "fits = pooled.fits(pick.budget_ms)\n", "fits = keeps\n",
             (f"{CONFIRM}::test_a_pick_keeps_its_guard_under_budget_less_guard_and_fits_under_the_budget_itself",)),
    Mutation("confirmation ignores --guard", "search/confirm.py",
             "share = guard_share(pooled, fixed)", "share = guard_share(pooled, None)",
             (f"{CONFIRM}::test_a_pick_keeps_its_guard_under_budget_less_guard_and_fits_under_the_budget_itself",)),
    Mutation("confirmation's guard from the first window only", "search/confirm.py",
             "share = guard_share(pooled, fixed)", "share = guard_share(combine_repeats(first.runs, protocol), fixed)",
             (f"{SEARCH_CONFIRM}::test_a_pick_that_fit_in_a_fast_window_is_over_budget_when_the_machine_slowed_and_is_said_so",)),
    Mutation("a pick that kept its guard still sets a floor", "search/confirm.py",
             "if rec is None or rec.keeps_guard:", "if rec is None:",
             (f"{CONFIRM}::test_a_pick_keeps_its_guard_under_budget_less_guard_and_fits_under_the_budget_itself",)),
    Mutation("over-budget note dropped after the confirmation", "search/confirm.py",
             'None if fits else "over its budget when measured again"', "None",
             (f"{CONFIRM}::test_a_pick_keeps_its_guard_under_budget_less_guard_and_fits_under_the_budget_itself",)),
    Mutation("a fixed --guard widened by the confirmation", "search/driver.py",
             "floor = guard_floor_of(pick) if ctx.settings.guard is None else None", "floor = guard_floor_of(pick)",
             (f"{SEARCH_CONFIRM}::test_the_device_chooses_again_only_where_the_confirmed_pick_lost_its_guard",)),
    Mutation("choice made again without the guard floor", "search/driver.py",
             "latency, True, guard_floor=floor)", "latency, True)",
             (f"{SEARCH_CONFIRM}::test_the_device_chooses_again_only_where_the_confirmed_pick_lost_its_guard",)),
    Mutation("a pick chosen again is not fine-tuned", "search/driver.py",
             "                with ctx.cpu.phase(\"finetune\"):\n                    again = finetune_pick(ctx, again)\n",
             "                pass\n",
             (f"{CONFIRM}::test_a_pick_chosen_again_after_a_lost_guard_is_fine_tuned_like_the_first",)),
    Mutation("guard floor replaces a wider own guard", "search/choose.py",
             "t.measured = replace(t.measured, guard=max(self.guard_floor, guard_share(t.measured, None)))",
             "t.measured = replace(t.measured, guard=self.guard_floor)",
             (f"{SEARCH_CONFIRM}::test_a_guard_floor_widens_every_candidates_guard_but_never_narrows_one",)),
    Mutation("guard floor ignored when measuring", "search/choose.py",
             "if self.guard_floor > 0:", "if False:",
             (f"{SEARCH_CONFIRM}::test_a_guard_floor_widens_every_candidates_guard_but_never_narrows_one",)),
    # the pick as one record: the lead over the runner-up, the split too small to separate the front, one write
    Mutation("runner-up is the least accurate rival", "search/lead.py",
             "return max(rivals, key=lambda t: (t.cand.fitness, -t.measured.figure_ms), default=None)",
             "return min(rivals, key=lambda t: (t.cand.fitness, -t.measured.figure_ms), default=None)",
             (f"{PICK}::test_the_lead_over_the_runner_up_is_mcnemars_test_on_their_validation_answers",)),
    Mutation("lead computed the other way round", "search/choose.py",
             'paired_comparison(val_hits, measurer.hits(rival, "val")', 'paired_comparison(measurer.hits(rival, "val"), val_hits',
             (f"{PICK}::test_the_lead_over_the_runner_up_is_mcnemars_test_on_their_validation_answers",)),
    Mutation("too-small line even when the lead is beyond noise", "search/lead.py",
             "if lead is None or len(scores) < 2 or lead.beyond_noise():", "if lead is None or len(scores) < 2:",
             (f"{PICK}::test_the_lead_over_the_runner_up_is_mcnemars_test_on_their_validation_answers",)),
    Mutation("too-small rule compares the other way", "search/lead.py",
             "return high - low > max(scores) - min(scores)", "return high - low < max(scores) - min(scores)",
             (f"{PICK}::test_a_split_too_small_to_separate_the_front_is_said_in_one_line",)),
    Mutation("each budget's pick written before the confirmation", "search/driver.py",
             "                pick = finetune_pick(ctx, pick)\n        picks.append(",
             "                pick = finetune_pick(ctx, pick)\n        write_picks(ctx.run, [pick], out / 'picks.json')\n"
             "        picks.append(",
             (f"{PICK}::test_a_fine_tuned_confirmed_pick_is_written_once",)),
    # a cheaper search: budgets share what they evaluated, a re-score pays only for the images not yet scored
    Mutation("a budget's evolution ignores the device's earlier candidates", "search/evolution.py",
             "for c in in_band(seeds, floor_ms, budget_ms)[:cfg.evaluations]:",
             "for c in in_band((), floor_ms, budget_ms)[:cfg.evaluations]:",
             ("tests/test_search_evolution.py::test_budgets_of_a_device_share_what_they_evaluated",)),
    Mutation("earlier candidates below the band adopted too", "search/evolution.py",
             "unique = {c.key: c for c in seeds if floor_ms <= c.latency_ms <= budget_ms}",
             "unique = {c.key: c for c in seeds if c.latency_ms <= budget_ms}",
             ("tests/test_search_evolution.py::test_budgets_of_a_device_share_what_they_evaluated",)),
    Mutation("an earlier candidate's fitness evaluated again", "search/evolution.py",
             "        ledger.adopt(c)\n", "        ledger.evaluate(c.subnet, 0)\n",
             ("tests/test_search_evolution.py::test_budgets_of_a_device_share_what_they_evaluated",)),
    Mutation("whole-split re-score counts the rest's accuracy twice", "search/fitness.py",
             'hits = _count(first["val_acc"], self.part_images)', 'hits = _count(rest["val_acc"], self.part_images)',
             ("tests/test_search_fitness.py::test_whole_split_from_a_scored_part_and_the_rest_equals_the_whole_split",)),
    Mutation("the confirmation's CPU billed to no pick", "search/confirm.py",
             "search_cpu_s=merged(p.search_cpu_s, share)) for p in todo}", "search_cpu_s=p.search_cpu_s) for p in todo}",
             (f"{SEARCH_CONFIRM}::test_the_confirmation_bills_each_confirmed_pick_an_equal_share_of_its_cpu",)),
    Mutation("candidates timed at full length while choosing", "search/choose.py",
             "measurer = _Measurer(ctx, staging, choice_protocol(protocol), guard_floor)",
             "measurer = _Measurer(ctx, staging, protocol, guard_floor)",
             (f"{PICK}::test_candidates_are_timed_a_quarter_second_per_repeat_and_the_pick_records_it",)),
    Mutation("the pick records the full protocol, not its figure's", "search/choose.py",
             "used = measurer.protocol if chosen.measured is not None else protocol",
             "used = protocol if chosen.measured is not None else protocol",
             (f"{PICK}::test_candidates_are_timed_a_quarter_second_per_repeat_and_the_pick_records_it",)),
    Mutation("a redirected progress line per postfix change", "progress.py",
             "super().set_postfix(ordered_dict, refresh=False, **kwargs)",
             "super().set_postfix(ordered_dict, refresh=refresh, **kwargs)",
             ("tests/test_progress.py::test_redirected_progress_writes_a_few_lines_not_one_per_step",)),
)


def source_of(m: Mutation, root: Path = ROOT) -> Path:
    return root / "src" / "tightfit" / m.file


def drifted(mutations: tuple[Mutation, ...]) -> list[str]:
    """One line for each mutation whose text is not found exactly once in its file (the code moved)."""
    out = []
    for m in mutations:
        n = source_of(m).read_text().count(m.text)
        if n != 1:
            out.append(f"{m.file}: the text of mutation {m.what!r} is found {n} times (expected once)")
    return out


def run_one(m: Mutation | None, python: str, tests: tuple[str, ...] = ()) -> tuple[bool, float, str]:
    """(failed, seconds, pytest's output): apply ``m`` (None: nothing) to a fresh copy and run its tests there."""
    with tempfile.TemporaryDirectory(prefix="tightfit-mutant-") as tmp:
        for part in ("src", "tests"):
            shutil.copytree(ROOT / part, Path(tmp) / part, ignore=shutil.ignore_patterns("__pycache__", "*.egg-info"))
        if m is not None:
            target = source_of(m, Path(tmp))
            text = target.read_text()
            if text.count(m.text) != 1:  # changed since the check in main (the tree is shared)
                print(f"error: {drifted((m,))[0]} in the copy; update the table", file=sys.stderr)
                sys.exit(2)
            target.write_text(text.replace(m.text, m.replacement))
        env = dict(os.environ, PYTHONPATH=str(Path(tmp) / "src"))
        t0 = time.perf_counter()
        proc = subprocess.run([python, "-m", "pytest", "-q", "-x", "-p", "no:cacheprovider", *(tests or m.tests)],
                              cwd=tmp, env=env, capture_output=True, text=True)
        return proc.returncode != 0, time.perf_counter() - t0, proc.stdout


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--list", action="store_true", help="print the table and exit")
    p.add_argument("--only", metavar="TEXT", help="only the mutations whose file or description contains TEXT")
    args = p.parse_args(argv)
    chosen = tuple(m for m in MUTATIONS if not args.only or args.only in m.file or args.only in m.what)
    if args.list:
        for m in chosen:
            print(f"{m.file:<22} {m.what}")
        return 0
    problems = drifted(chosen)
    if problems:
        print("error: the table has drifted from the code; update it\n  " + "\n  ".join(problems), file=sys.stderr)
        return 2
    t0, survivors = time.perf_counter(), []
    every_test = tuple(dict.fromkeys(t for m in chosen for t in m.tests))
    failed, _, output = run_one(None, sys.executable, every_test)
    if failed:  # a kill only counts if the unmutated code passes
        lines = [line for line in output.splitlines() if line.startswith(("FAILED", "ERROR"))]
        print("error: the named tests fail on the unmutated code; fix them first\n  " + "\n  ".join(lines),
              file=sys.stderr)
        return 2
    for i, m in enumerate(chosen, 1):
        killed, seconds, _ = run_one(m, sys.executable)
        print(f"[{i:>2}/{len(chosen)}] {'killed  ' if killed else 'SURVIVED'} {seconds:5.1f} s  {m.file}: {m.what}",
              flush=True)
        if not killed:
            survivors.append(m)
    print(f"{len(chosen) - len(survivors)} of {len(chosen)} mutations killed in {time.perf_counter() - t0:.0f} s")
    for m in survivors:
        print(f"survived: {m.file}: {m.what}")
    return 1 if survivors else 0


if __name__ == "__main__":
    sys.exit(main())
