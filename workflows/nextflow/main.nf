#!/usr/bin/env nextflow
// Fit reference axes on the demo data and score a new batch against them.
//   axiscope simulate --out data
//   nextflow run main.nf            (again with -resume: finished tasks are not redone)
nextflow.enable.dsl = 2

include { AXISCOPE_FIT; AXISCOPE_SCORE } from './modules/axiscope'

params.reference = "${projectDir}/data/reference.zarr"
params.new_batch = "${projectDir}/data/new_batch.zarr"
params.settings = "${projectDir}/axiscope.toml"
params.checkpoints = "${launchDir}/checkpoints"
params.outdir = "${launchDir}/results"

workflow {
    settings = file(params.settings)
    reference = Channel.of(tuple("reference", file(params.reference, type: 'dir')))
    fitted = AXISCOPE_FIT(reference, settings)
    batch = fitted.result.map { name, fit -> tuple(name, fit, file(params.new_batch, type: 'dir'),
                                                   file(params.reference, type: 'dir')) }
    AXISCOPE_SCORE(batch, settings)
}
