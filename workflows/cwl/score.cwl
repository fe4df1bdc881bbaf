#!/usr/bin/env cwl-runner
# axiscope score as a CWL CommandLineTool: new samples placed on a fit's axes, with T²/Q flags.
cwlVersion: v1.2
class: CommandLineTool
label: "axiscope score: place new samples on a fit's axes and flag those it does not describe"
baseCommand: [axiscope, score]
arguments: ["--quiet"]
successCodes: [0]
permanentFailCodes: [1, 2]
temporaryFailCodes: [3, 130, 143]
inputs:
  model:
    type: Directory
    doc: "The folder written by 'axiscope fit' (or its model/ subfolder)."
    inputBinding: {position: 1}
  matrix:
    type: [File, Directory]
    doc: "The new samples."
    inputBinding: {position: 2}
  reference:
    type:
      - "null"
      - File
      - Directory
    doc: "The matrix the model should have been fitted on: a warning when it is another file."
    inputBinding: {prefix: --reference}
  settings:
    type: File?
    doc: "TOML file of score options ([score] table or top level)."
    inputBinding: {prefix: --config}
  confidence:
    type: float?
    inputBinding: {prefix: --confidence}
  threads:
    type: int?
    inputBinding: {prefix: --threads}
  out_name:
    type: string
    default: score
    inputBinding: {prefix: --out}
outputs:
  result:
    type: Directory
    doc: "scores.tsv, diagnostics.tsv and manifest.json."
    outputBinding: {glob: $(inputs.out_name)}
  diagnostics:
    type: File
    outputBinding: {glob: $(inputs.out_name)/diagnostics.tsv}
