"""Rule script: Tully-Fisher distances for one shard with one calibration."""
import dataclasses

from galdist import calibration, extinction, io, passbands, tully_fisher, uncertainty
from galdist.logs import logged

with logged(snakemake.log[0], f"Tully-Fisher, shard {snakemake.wildcards.shard}"):
    cfg, bands = snakemake.params.tully_fisher, snakemake.params.bands
    band = cfg["band"]
    cal = calibration.load_calibration(snakemake.input.calibration)
    r_band = extinction.ExtinctionCoefficients.from_dict(io.read_json(snakemake.input.coefficients)).per_true_ebv()[band]
    names = [f"mag_{band}", f"mag_{band}_err", "w50", "w50_err", "axis_ratio", "axis_ratio_err", "z_helio",
             "hi_flux", "w50_resolution", "quality_flags"]
    cols, fp = io.read_shard(snakemake.input.shard, names,
                             {"extinction": snakemake.input.extinction, "kcorrect": snakemake.input.kcorrect},
                             {"extinction": ["ebv_used_err", f"A_{band}", "ext_flags"],
                              "kcorrect": [f"K_{band}", "kcorr_flags"]})
    settings = dataclasses.replace(
        tully_fisher.TFSettings.from_config(cfg, ignore=tully_fisher.WORKFLOW_KEYS),
        input_system=bands[band]["system"], ab_minus_vega=bands[band]["ab_minus_vega"])
    no_mc = dataclasses.replace(settings, mc_draws=0)
    inputs = {"mag": cols[f"mag_{band}"], "mag_err": cols[f"mag_{band}_err"],
              "a_gal": cols[f"A_{band}"], "a_gal_err": r_band * cols["ebv_used_err"], "k_corr": cols[f"K_{band}"]}
    inputs |= {k: cols[k] for k in ("w50", "w50_err", "axis_ratio", "axis_ratio_err", "z_helio", "w50_resolution",
                                    "quality_flags", "ext_flags", "kcorr_flags")}
    if cal.form == "baryonic":
        inputs["hi_flux"] = cols["hi_flux"]
    out = uncertainty.monte_carlo_on_subsample(
        lambda rows, mc: tully_fisher.tully_fisher_distance(rows, cal, settings if mc else no_mc),
        inputs, "tf_mu", "tf_mu_err_mc", cfg["mc_max_rows"])
    passbands.flag_override(out["tf_flags"], "tully_fisher", cal, cfg, bands)
    units = {"tf_inclination_deg": "deg", "tf_w_z": "km / s", "tf_w_r": "km / s", "tf_d_mpc": "Mpc",
             "tf_d_err_mpc": "Mpc"} | {k: "mag" for k in ("tf_a_int", "tf_mag_corr", "tf_abs_mag", "tf_mu",
                                                          "tf_mu_err", "tf_mu_err_mc")}
    io.write_stage_columns(out, snakemake.output[0], fp, units,
                           {"galdist.calibration.sha256": cal.sha256, "galdist.calibration.name": cal.name})
