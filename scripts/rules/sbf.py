"""Rule script: SBF distances for one shard with one calibration."""
import dataclasses

from galdist import calibration, extinction, io, passbands, sbf, uncertainty
from galdist.logs import logged

with logged(snakemake.log[0], f"SBF, shard {snakemake.wildcards.shard}"):
    cfg, bands = snakemake.params.sbf, snakemake.params.bands
    cal = calibration.load_calibration(snakemake.input.calibration)
    band, (blue, red) = cfg["band"], cfg["color_bands"]
    r = extinction.ExtinctionCoefficients.from_dict(io.read_json(snakemake.input.coefficients)).per_true_ebv()
    cols, fp = io.read_shard(
        snakemake.input.shard, ["sbf_mag", "sbf_mag_err", "sbf_color", "sbf_color_err", "quality_flags"],
        {"extinction": snakemake.input.extinction, "kcorrect": snakemake.input.kcorrect},
        {"extinction": ["ebv_used", "ebv_used_err", "ext_flags"],
         "kcorrect": [f"K_{band}", f"K_{blue}", f"K_{red}", "kcorr_flags"]})
    settings = sbf.SBFSettings.from_config(
        cfg, ignore=sbf.WORKFLOW_KEYS,
        mag_offset=sbf.system_offset(bands[band]["system"], cal.system, bands[band]["ab_minus_vega"]),
        color_offset=sbf.color_system_offset(bands[blue]["system"], bands[blue]["ab_minus_vega"],
                                             bands[red]["system"], bands[red]["ab_minus_vega"], cal.system))
    inputs = {k: cols[k] for k in ("sbf_mag", "sbf_mag_err", "sbf_color", "sbf_color_err", "quality_flags",
                                   "ebv_used", "ebv_used_err", "ext_flags", "kcorr_flags")}
    inputs |= {"R_mag": r[band], "R_blue": r[blue], "R_red": r[red],
               "K_mag": cols[f"K_{band}"], "K_blue": cols[f"K_{blue}"], "K_red": cols[f"K_{red}"]}
    no_mc = dataclasses.replace(settings, mc_draws=0)
    out = uncertainty.monte_carlo_on_subsample(
        lambda rows, mc: sbf.sbf_distance(rows, cal, settings if mc else no_mc),
        inputs, "sbf_mu", "sbf_mu_err_mc", cfg["mc_max_rows"])
    passbands.flag_override(out["sbf_flags"], "sbf", cal, cfg, bands)
    units = {k: "mag" for k in out if k.endswith(("_mu", "_mu_err", "_mu_err_mc", "color_0", "mag_0", "abs_mag"))}
    io.write_stage_columns(out, snakemake.output[0], fp, units | {"sbf_d_mpc": "Mpc", "sbf_d_err_mpc": "Mpc"},
                           {"galdist.calibration.sha256": cal.sha256, "galdist.calibration.name": cal.name})
