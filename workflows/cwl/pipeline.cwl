#!/usr/bin/env cwl-runner
# Fit reference axes, then score a new batch against them.
#   axiscope simulate --out data && cwltool pipeline.cwl job.yml
cwlVersion: v1.2
class: Workflow
label: "axiscope: fit reference axes, score a new batch"
inputs:
  reference: [File, Directory]
  new_batch: [File, Directory]
  settings: File?
  components: int?
  checkpoint: string?
  resume: boolean?
outputs:
  fit_result:
    type: Directory
    outputSource: fit/result
  score_result:
    type: Directory
    outputSource: score/result
steps:
  fit:
    run: fit.cwl
    in:
      matrix: reference
      settings: settings
      components: components
      checkpoint: checkpoint
      resume: resume
    out: [result, model, manifest]
  score:
    run: score.cwl
    in:
      model: fit/result
      matrix: new_batch
      reference: reference
      settings: settings
    out: [result, diagnostics]
