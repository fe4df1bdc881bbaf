// axiscope processes for Nextflow (DSL2): include { AXISCOPE_FIT; AXISCOPE_SCORE } from './modules/axiscope'
//
// Exit codes of axiscope: 0 success, 1 internal error, 2 bad input or usage, 3 memory or
// disk could not be had, 130 interrupted, 143 terminated. Only 3, 130 and 143 are retried.
// A retried fit continues from its checkpoint (kept outside the task's work folder, in
// params.checkpoints) instead of starting over, and gives the very same tables.

process AXISCOPE_FIT {
    tag "${name}"
    cpus 2
    errorStrategy { task.exitStatus in [3, 130, 143] ? 'retry' : 'terminate' }
    maxRetries 2

    input:
    tuple val(name), path(matrix)
    path settings

    output:
    tuple val(name), path("fit"), emit: result

    script:
    """
    axiscope fit ${matrix} --config ${settings} --out fit --quiet --threads ${task.cpus} \\
        --checkpoint ${params.checkpoints}/${name} --resume --log-format json 2> fit.log.jsonl
    """
}

process AXISCOPE_SCORE {
    tag "${name}"
    cpus 2
    errorStrategy { task.exitStatus in [3, 130, 143] ? 'retry' : 'terminate' }
    maxRetries 2

    input:
    tuple val(name), path(fit), path(matrix), path(reference)
    path settings

    output:
    tuple val(name), path("score"), emit: result

    script:
    """
    axiscope score ${fit} ${matrix} --config ${settings} --reference ${reference} --out score --quiet \\
        --threads ${task.cpus}
    """
}
