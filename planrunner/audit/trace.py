"""The traceability matrix: each README section that makes a promise, and the tests that check it.

Every `##` and `###` heading of the README is either in TRACE (with at least one test, named
`tests/FILE::FUNCTION`) or in NO_PROMISE (with the reason it promises nothing a test could
check). `tests/test_traceability.py` fails when a heading is in neither or a named test does not
exist, so a new README section needs a line here. `planrunner qualify` prints the matrix.
"""

from __future__ import annotations

import re

AUDIT, SIGN, CLI = "tests/test_audit.py::", "tests/test_signatures.py::", "tests/test_cli.py::"
QUALIFY = "tests/test_qualify.py::"

TRACE: dict[str, tuple[str, ...]] = {
    "planrunner": (CLI + "test_demo_plan_runs_and_writes_three_files",
                   CLI + "test_rerun_gives_identical_numbers_in_a_new_folder",
                   AUDIT + "test_verify_untouched_run_is_identical"),
    "Set-up on a fresh machine (Python 3.11 or newer)": (
        "tests/test_packaging.py::test_readme_has_exactly_two_setup_commands_and_ci_runs_the_test_one",
        "tests/test_packaging.py::test_wheel_contains_templates", CLI + "test_demo_plan_runs_and_writes_three_files"),
    "Commands": ("tests/test_init.py::test_init_on_each_demo_data_file_passes_check",
                 "tests/test_init.py::test_init_types_every_kind_of_column_in_every_format",
                 "tests/test_init.py::test_init_shows_nothing_of_the_values",
                 "tests/test_init.py::test_init_never_replaces_a_file",
                 CLI + "test_check_valid_plan_exit_0", CLI + "test_check_invalid_plan_exit_2_without_traceback",
                 CLI + "test_missing_plan_and_bad_arguments_exit_2",
                 CLI + "test_unexpected_failure_exit_1_with_versions",
                 CLI + "test_python_dash_m_entry_point", "tests/test_faults.py::test_data_root_option",
                 "tests/test_bad_inputs.py::test_bad_input_gives_one_clear_message",
                 "tests/test_history_text.py::test_a_name_with_a_control_character_is_refused_before_anything_is_written"),
    "The plan": ("tests/test_plan_corpus.py::test_invalid_plan_is_reported_where_and_what",
                 "tests/test_fuzz_plans.py::test_random_yaml_like_text"),
    "Top level": (AUDIT + "test_plan_schema_validates_every_plan", AUDIT + "test_plan_schema_rejects_an_unknown_key"),
    "Datasets": ("tests/test_data.py::test_types_are_converted",
                 "tests/test_data.py::test_missing_rows_dropped_and_counted",
                 "tests/test_data.py::test_keep_filter_counts_exclusions", "tests/test_data.py::test_sha256_pin",
                 "tests/test_data.py::test_symlink_out_of_the_plan_folder_is_refused",
                 "tests/test_hardening.py::test_undeclared_columns_are_ignored_and_recorded",
                 "tests/test_expr.py::test_random_typed_trees_match_the_reference"),
    "Analysis sets": ("tests/test_sets.py::test_a_set_gives_the_numbers_of_its_rows_alone",
                      "tests/test_sets.py::test_the_record_lists_each_sets_rows_and_exclusions",
                      "tests/test_sets.py::test_a_sets_condition_with_no_value_names_the_lines",
                      "tests/test_plan_corpus.py::test_invalid_plan_is_reported_where_and_what"),
    "Data formats": ("tests/test_formats.py::test_one_frame_in_six_formats_gives_identical_numbers",
                     "tests/test_formats.py::test_xpt_labels_and_formats_reach_the_data_dictionary",
                     "tests/test_formats.py::test_ibm_doubles_by_their_definition",
                     "tests/test_formats.py::test_xpt_from_an_independent_writer_reads_as_that_writers_reader_reads_it",
                     "tests/test_formats.py::test_values_keep_every_bit_through_their_text",
                     "tests/test_formats.py::test_dataset_json_version_1_0_is_read_too",
                     "tests/test_formats.py::test_typed_errors_name_rows_not_lines",
                     "tests/test_formats.py::test_a_missing_optional_package_is_named_with_the_install_line",
                     "tests/test_bad_inputs.py::test_bad_input_gives_one_clear_message"),
    "Analyses": ("tests/test_plans_outside_values.py::test_pt_mouse_exact_permutation_from_a_plan",
                 "tests/test_plans_outside_values.py::test_percentile_and_bca_agree_with_scipy_bootstrap",
                 "tests/test_plans_bootstrap_designs.py::test_bs_mouse_exhaustive_from_a_plan",
                 "tests/test_plans_bootstrap_designs.py::test_blocks_and_parametric_from_a_plan",
                 "tests/test_plans_bootstrap_designs.py::test_on_degenerate_fail_from_a_plan",
                 "tests/test_plans_bootstrap_designs.py::test_saved_distribution_matches_its_hash"),
    "Statistics": ("tests/test_engines_statistics_registry.py::test_one_group_statistics_against_references",
                   "tests/test_engines_statistics_registry.py::test_two_column_statistics_against_references",
                   "tests/test_engines_statistics_registry.py::test_two_group_statistics_against_references",
                   "tests/test_engines_statistics_registry.py::test_analytic_standard_errors"),
    "The bootstrap design": ("tests/test_plans_bootstrap_designs.py::test_pairs_from_a_plan_give_the_ideal_paired_se",
                             "tests/test_plans_bootstrap_designs.py::test_clusters_from_a_plan",
                             "tests/test_engines_designs.py::test_clusters_are_resampled_within_strata",
                             "tests/test_engines_bootstrap.py::test_strata_keep_cells_and_give_stratified_variance"),
    "Censored data (time to event and detection limits)": (
        "tests/test_survival.py::test_gehan_published_medians_and_logrank",
        "tests/test_survival.py::test_curve_equals_scipy_ecdf_and_statsmodels",
        "tests/test_survival.py::test_quantile_rule_in_exact_arithmetic",
        "tests/test_survival.py::test_rmst_is_the_area_under_the_step_function",
        "tests/test_survival.py::test_logrank_equals_survdiff_also_stratified",
        "tests/test_survival.py::test_fast_path_equals_the_plain_gather_bit_for_bit",
        "tests/test_survival.py::test_median_not_reached_in_some_resamples_is_counted_and_handled",
        "tests/test_survival.py::test_left_censoring_is_the_flipped_right_censored_curve",
        "tests/test_survival.py::test_plan_runs_end_to_end",
        "tests/test_survival.py::test_record_holds_the_curves_and_the_report_draws_them",
        "tests/test_survival.py::test_left_censored_plan_reports_on_the_concentration_scale",
        "tests/test_survival.py::test_shifting_times_shifts_quantiles_and_keeps_the_logrank",
        "tests/test_survival.py::test_permutation_refusal_of_a_censored_statistic_points_to_logrank",
        "tests/test_bad_inputs.py::test_bad_input_gives_one_clear_message"),
    "One-sided bootstrap bounds": (
        "tests/test_bootstrap_bounds.py::test_percentile_and_basic_bounds_equal_scipy_on_the_same_replicates",
        "tests/test_bootstrap_bounds.py::test_bca_bound_matches_scipy_on_the_same_replicates",
        "tests/test_bootstrap_bounds.py::test_identity_20_one_sided_bound_is_an_end_of_the_2c_minus_1_interval",
        "tests/test_bootstrap_bounds.py::test_bounds_from_a_plan_reach_record_and_reports"),
    "Bootstrap p-values of a null value": (
        "tests/test_bootstrap_pvalues.py::test_identity_21_p_below_alpha_exactly_when_the_bound_excludes_the_null",
        "tests/test_bootstrap_pvalues.py::test_exponential_bootstrap_t_p_value_is_the_exact_chi_square_test",
        "tests/test_bootstrap_pvalues.py::test_exhaustive_percentile_p_value_of_the_median_is_binomial",
        "tests/test_bootstrap_pvalues.py::test_stated_monte_carlo_sd_matches_the_spread_over_streams",
        "tests/test_bootstrap_pvalues.py::test_null_value_from_a_plan_reaches_record_and_reports"),
    "The parametric bootstrap-t with the model's standard error": (
        "tests/test_parametric_bootstrap_t.py::test_identity_11_exponential_bootstrap_t_is_the_exact_chi_square_interval",
        "tests/test_parametric_bootstrap_t.py::test_identity_11_normal_bootstrap_t_is_the_exact_student_interval",
        "tests/test_parametric_bootstrap_t.py::test_model_standard_errors_of_two_groups_poisson_and_binomial",
        "tests/test_parametric_bootstrap_t.py::test_model_se_from_a_plan"),
    "Model statistics": ("tests/test_models.py::test_ols_and_robust_covariances_equal_statsmodels",
                         "tests/test_models.py::test_logistic_fit_and_g_computation_equal_statsmodels",
                         "tests/test_models.py::test_estimates_from_a_plan_equal_statsmodels",
                         "tests/test_models.py::test_wild_bootstrap_se_matches_hc0",
                         "tests/test_models.py::test_residual_bootstrap_se_matches_the_analytic_se",
                         "tests/test_models.py::test_wild_cluster_enumeration_equals_a_loop_over_every_sign_vector",
                         "tests/test_models.py::test_a_hand_computed_enumeration_of_five_clusters",
                         "tests/test_models.py::test_the_numbers_do_not_depend_on_how_resamples_are_split",
                         "tests/test_models.py::test_constant_and_collinear_covariates_are_refused_whatever_their_scale",
                         "tests/test_models.py::test_separation_is_refused_never_a_huge_coefficient",
                         "tests/test_models.py::test_freedman_lane_of_the_group_coefficient_is_the_partial_slope_of_its_indicator",
                         "tests/test_bad_inputs.py::test_bad_input_gives_one_clear_message"),
    "Multiplicity": ("tests/test_engines_randomization.py::test_adjustments_match_statsmodels_bh95",
                     "tests/test_permutation_plans.py::test_max_t_family_end_to_end_and_order_free"),
    "Resamples to a stated precision": (
        "tests/test_precision.py::test_disagreement_rate_over_seeds_is_within_the_bound",
        "tests/test_precision.py::test_sequential_decisions_agree_with_the_exact_mann_whitney_decision",
        "tests/test_precision.py::test_p_near_one_half_stops_after_one_block_and_near_alpha_uses_many",
        "tests/test_precision.py::test_bootstrap_resamples_match_the_andrews_buchinsky_formula",
        "tests/test_precision.py::test_plan_records_the_rule_serially_and_on_two_workers_alike_and_verify_reproduces",
        "tests/test_precision.py::test_a_test_stopped_at_the_maximum_says_unresolved"),
    "What planrunner refuses and why": ("tests/test_bad_inputs.py::test_bad_input_gives_one_clear_message",
                                        "tests/test_plan_corpus.py::test_invalid_plan_is_reported_where_and_what",
                                        "tests/test_permutation_plans.py::test_incomplete_pair_is_refused",
                                        "tests/test_check_refusals.py::test_check_reports_what_run_refuses_before_any_draw"),
    "Methods and conventions": ("tests/test_engines_bootstrap.py::test_percentile_and_bca_agree_with_scipy",
                                "tests/test_engines_bootstrap.py::test_z0_mid_rank_rule",
                                "tests/test_engines_streams.py::test_generator_matches_documented_construction",
                                "tests/test_engines_permutation.py::test_mouse_two_sided_matches_scipy"),
    "Permutation and randomization tests": (
        "tests/test_engines_permutation.py::test_mouse_exact",
        "tests/test_permutation_plans.py::test_darwin_sign_flip_and_signed_rank",
        "tests/test_permutation_plans.py::test_freedman_lane_by_definition",
        "tests/test_permutation_plans.py::test_cluster_shuffle_by_definition_and_few_clusters_warning",
        "tests/test_permutation_plans.py::test_shift_interval_rank_sum_is_the_hodges_lehmann_interval"),
    "The record": (AUDIT + "test_record_schema_validates_real_records",
                   AUDIT + "test_record_carries_the_hash_of_its_own_content",
                   AUDIT + "test_methods_text_names_what_ran",
                   "tests/test_exact_counts.py::test_rank_sum_counts_past_two_to_the_53_are_exact_digits",
                   "tests/test_exact_counts.py::test_beyond_the_exact_bound_the_record_says_the_counts_are_not_exact",
                   "tests/test_record_descriptives.py::test_each_cell_matches_the_statistics_module",
                   "tests/test_record_descriptives.py::test_missing_and_excluded_counts_add_up_to_the_datasets"),
    "The reports": ("tests/test_report.py::test_html_is_self_contained",
                    "tests/test_report.py::test_summary_table_comes_first_and_labels_p_values",
                    "tests/test_report.py::test_numbers_are_rounded_by_their_monte_carlo_error",
                    "tests/test_report.py::test_reports_are_byte_stable_for_the_same_record",
                    "tests/test_report_plots.py::test_each_interval_method_keeps_its_style_and_its_name_whatever_its_position",
                    "tests/test_report_plots.py::test_an_exact_binary_null_is_drawn_at_its_support_points_with_their_probabilities",
                    "tests/test_report_plots.py::test_decision_margin_and_limits_are_drawn_when_the_record_has_them",
                    "tests/test_pdf.py::test_every_section_is_in_the_pdf_with_run_id_and_page_numbers",
                    "tests/test_pdf.py::test_without_a_browser_one_message_says_how_to_get_one"),
    "Parameters": (AUDIT + "test_parameter_fills_file_and_titles_and_is_recorded",
                   AUDIT + "test_parameter_value_that_does_not_match_is_refused",
                   AUDIT + "test_parameter_without_value_or_default_is_refused"),
    "Audit trail": (AUDIT + "test_lock_then_edit_then_run_lists_the_deviation_with_its_path",
                    AUDIT + "test_verify_untouched_run_is_identical",
                    AUDIT + "test_history_lists_runs_and_the_chain_is_intact"),
    "Locking a plan": (AUDIT + "test_lock_then_edit_then_run_lists_the_deviation_with_its_path",
                       AUDIT + "test_changed_setting_and_changed_comment_are_told_apart",
                       AUDIT + "test_data_changed_after_lock_is_a_deviation",
                       AUDIT + "test_lock_is_never_replaced_and_an_edited_lock_is_refused",
                       AUDIT + "test_refuse_deviations_without_a_lock_is_an_error"),
    "Verifying a run": (AUDIT + "test_verify_fails_after_one_data_byte_changes",
                        AUDIT + "test_verify_names_the_field_even_when_the_tamperer_rehashes",
                        AUDIT + "test_same_environment_allows_no_monte_carlo_slack",
                        AUDIT + "test_a_forged_environment_does_not_switch_on_the_monte_carlo_tolerance",
                        AUDIT + "test_an_installation_with_other_draws_allows_the_stated_monte_carlo_tolerance",
                        AUDIT + "test_a_rerun_on_the_recorded_environment_is_bit_for_bit_and_says_so",
                        AUDIT + "test_this_installation_draws_the_reference_numbers",
                        AUDIT + "test_tolerance_rules",
                        AUDIT + "test_verify_of_a_run_on_workers_passes_on_any_executor"),
    "Run history": (AUDIT + "test_history_detects_an_edited_entry", AUDIT + "test_history_detects_a_removed_entry",
                    AUDIT + "test_history_detects_a_replaced_record"),
    "Signatures": (SIGN + "test_keygen_writes_an_owner_only_encrypted_key_and_never_replaces_it",
                   SIGN + "test_wrong_or_missing_passphrase_is_exit_2_naming_the_key",
                   SIGN + "test_a_signed_run_verifies_and_its_history_entry_carries_the_signature",
                   SIGN + "test_a_signature_copied_onto_another_record_is_detected",
                   SIGN + "test_a_signature_by_an_untrusted_key", SIGN + "test_a_removed_or_expired_signer",
                   SIGN + "test_a_signer_without_the_role_and_a_wrong_name",
                   SIGN + "test_refuse_deviations_requires_an_approved_lock", SIGN + "test_signing_a_history_entry",
                   SIGN + "test_no_private_key_or_passphrase_is_ever_written",
                   SIGN + "test_every_field_of_a_signature_is_bound"),
    "Threat model: what the hashes, the chain and the signatures protect against": (
        SIGN + "test_a_record_edited_with_a_recomputed_hash_fails_verify",
        SIGN + "test_a_history_rewritten_with_recomputed_hashes_fails",
        SIGN + "test_a_forged_signature_field_is_detected", SIGN + "test_a_removed_or_expired_signer",
        AUDIT + "test_history_detects_a_removed_entry",
        AUDIT + "test_a_lock_rewritten_with_its_hash_recomputed_is_accepted_as_the_readme_says",
        QUALIFY + "test_a_changed_installed_file_fails_the_installation_qualification"),
    "Index of runs": ("tests/test_index.py::test_each_run_rewrites_the_index_with_every_run_in_order",
                      "tests/test_index.py::test_the_numbers_across_runs_are_the_records_own",
                      "tests/test_index.py::test_history_writes_the_same_view_as_html_and_markdown",
                      "tests/test_index.py::test_a_run_is_complete_even_when_the_index_cannot_be_written",
                      "tests/test_report_browser.py::test_index_page_loads_cleanly_and_fits"),
    "Comparing runs": (AUDIT + "test_compare_shows_a_changed_estimate", AUDIT + "test_compare_lists_plan_differences",
                       "tests/test_report_layout.py::test_comparison_page_is_the_report_look_escaped_and_self_contained",
                       "tests/test_report_browser.py::test_comparison_page_loads_cleanly_and_fits"),
    "JSON Schemas": (AUDIT + "test_plan_schema_validates_every_plan",
                     AUDIT + "test_record_schema_validates_real_records",
                     AUDIT + "test_schema_command_prints_json"),
    "Self-check": (AUDIT + "test_selfcheck_passes_and_its_report_is_hashed", AUDIT + "test_a_failing_case_fails",
                   AUDIT + "test_selfcheck_runs_from_the_built_wheel_alone"),
    "Qualification": (QUALIFY + "test_a_changed_installed_file_fails_the_installation_qualification",
                      QUALIFY + "test_the_pack_from_a_development_checkout",
                      QUALIFY + "test_a_signed_pack_and_an_edited_pack",
                      "tests/test_traceability.py::test_every_readme_section_is_traced_or_makes_no_promise"),
    "Parallel and distributed runs": (
        "tests/test_execution.py::test_demo_plan_identical_serial_threads_processes_and_dask",
        "tests/test_execution.py::test_interrupt_stops_cleanly_without_a_record",
        "tests/test_termination.py::test_sigterm_stops_every_worker_process",
        "tests/test_termination.py::test_sigterm_stops_a_run_in_one_process",
        "tests/test_execution.py::test_progress_bar_is_silent_off_a_terminal_and_when_quiet",
        "tests/test_execution.py::test_dask_missing_is_a_clear_error",
        "tests/test_resample_ranges.py::test_bootstrap_split_ranges_are_bit_identical"),
    "Speed and memory": (
        "tests/test_execution.py::test_memory_of_one_engine_call_stays_bounded_as_resamples_grow",
        "tests/test_engines_designs.py::test_order_fast_path_equals_plain_on_large_groups",
        "tests/test_engines_permutation.py::test_key_window_path_is_range_invariant_and_equals_plain",
        "tests/test_engines_randomization.py::test_sign_flip_byte_tables_equal_plain"),
    # the timings are of one machine; the promise is that the replicates are the same on any executor
    "Schemes scipy does not offer: one worker against two": (
        "tests/test_resample_ranges.py::test_bootstrap_split_ranges_are_bit_identical",
        "tests/test_execution.py::test_demo_plan_identical_serial_threads_processes_and_dask"),
    # the timings are of one machine; the promise is that the nulls are the same on any executor
    "Permutation designs on two workers": (
        "tests/test_resample_ranges.py::test_sign_flip_split_ranges_are_bit_identical",
        "tests/test_resample_ranges.py::test_cluster_split_ranges_are_bit_identical",
        "tests/test_resample_ranges.py::test_association_split_ranges_are_bit_identical",
        "tests/test_permutation_executors.py::"
        "test_permutation_designs_identical_serial_threads_processes_and_dask"),
    "Start-up": ("tests/test_startup.py::test_version_loads_no_heavy_library",
                 "tests/test_startup.py::test_plan_only_check_loads_no_heavy_library"),
    "Large files": ("tests/test_columnar.py::test_edge_decimals_are_the_correctly_rounded_doubles",
                    "tests/test_columnar.py::test_hard_decimals_at_random_agree_with_the_correct_rounding",
                    "tests/test_columnar.py::test_random_files_read_the_same_both_ways",
                    "tests/test_columnar.py::test_bad_input_corpus_reads_the_same_both_ways",
                    "tests/test_columnar.py::test_a_plain_file_is_read_by_the_fast_path"),
    "Standing caution": ("tests/test_report.py::test_provenance_lists_plan_data_exclusions_seed_environment",),
}

NO_PROMISE: dict[str, str] = {
    "Measured": "timings of one machine on one day; tests never assert timings "
                "(benchmarks/compare_scipy.py measures them again)",
    "Development": "points to DEVELOPERS.md",
}

_HEADING = re.compile(r"^(#{1,3}) (.+?)\s*$")


def readme_sections(text: str) -> list[tuple[str, int]]:
    """(heading, line) of every #, ## and ### heading outside code blocks."""
    sections, fenced = [], False
    for number, line in enumerate(text.splitlines(), start=1):
        if line.startswith("```"):
            fenced = not fenced
            continue
        match = None if fenced else _HEADING.match(line)
        if match:
            sections.append((match.group(2), number))
    return sections
