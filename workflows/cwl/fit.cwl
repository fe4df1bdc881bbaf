#!/usr/bin/env cwl-runner
# axiscope fit as a CWL CommandLineTool. Options not listed as inputs go into the
# settings file (TOML, keyed by long option name: see 'axiscope fit --help').
cwlVersion: v1.2
class: CommandLineTool
label: "axiscope fit: principal axes of a matrix, with tables, a model and a manifest"
baseCommand: [axiscope, fit]
arguments: ["--quiet"]
# axiscope's exit codes: 2 bad input or usage (retrying cannot help); 3 memory or disk
# could not be had, 130/143 interrupted or terminated (a retry may succeed)
successCodes: [0]
permanentFailCodes: [1, 2]
temporaryFailCodes: [3, 130, 143]
inputs:
  matrix:
    type: [File, Directory]
    doc: "The matrix: .h5/.hdf5, Zarr directory, .npy, .csv/.tsv/.txt (optionally .gz)."
    inputBinding: {position: 1}
  settings:
    type: File?
    doc: "TOML file of fit options ([fit] table or top level); the inputs below override it."
    inputBinding: {prefix: --config}
  components:
    type: int?
    doc: "Number of principal components."
    inputBinding: {prefix: --components}
  counts_per:
    type: float?
    doc: "Scale each sample so that its values sum to this (1e6: counts per million)."
    inputBinding: {prefix: --counts-per}
  log:
    type: boolean?
    doc: "Replace each value x by log(1 + x)."
    inputBinding: {prefix: --log}
  threads:
    type: int?
    inputBinding: {prefix: --threads}
  memory_limit:
    type: string?
    doc: "Memory limit of the whole process, e.g. 4GB."
    inputBinding: {prefix: --memory-limit}
  checkpoint:
    type: string?
    doc: >-
      A folder outside the job's working directory (shared storage) where the fit keeps its
      state after each pass; a retried job given the same folder continues from it.
    inputBinding: {prefix: --checkpoint}
  resume:
    type: boolean?
    doc: "With checkpoint (only): continue from the state kept there, when there is one."
    inputBinding: {prefix: --resume}
  out_name:
    type: string
    default: fit
    inputBinding: {prefix: --out}
outputs:
  result:
    type: Directory
    doc: "The fit's folder: tables, model/, manifest.json, axis cards."
    outputBinding: {glob: $(inputs.out_name)}
  model:
    type: Directory
    outputBinding: {glob: $(inputs.out_name)/model}
  manifest:
    type: File
    outputBinding: {glob: $(inputs.out_name)/manifest.json}
