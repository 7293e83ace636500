//! One gradient step, the same for every trainer: build the loss, backpropagate, sum over
//! the processes training together, clip, update.

use candle_core::{DType, Tensor};

use crate::collective::Collective;
use crate::error::Result;
use crate::nn::optim::{AdamW, StepStats};
use crate::util::stack::run_deep;

/// One process's part of a step: its loss over its share of the minibatch, scaled so that the
/// parts sum to the minibatch's loss, what the caller keeps, and figures (loss parts) to sum
/// over the group.
/// (The gradients take the loss's place once it is backpropagated: `Part<V, Gradients>`.)
pub(crate) type Part<V, L = Tensor> = (L, V, Vec<f64>);

/// One gradient step of a group of processes that share each minibatch: every process builds
/// its part of the loss with `forward` (`None` when it has no rows of this minibatch) and
/// backpropagates it, the gradients and the `figures` numbers are summed over the group
/// ([`Collective`]), and every process takes the same AdamW step at learning rate `lr`, with
/// the gradient clipped to norm `max_grad_norm`. In a group of one nothing is summed.
///
/// The graph is built, differentiated and dropped on a deep-stack thread (candle's backward
/// pass recurses once per node of the path); the reductions run on the caller's thread.
///
/// A non-finite loss or gradient on one process makes the summed gradient non-finite on
/// every process, so all of them skip the update together ([`crate::error::Error::NonFinite`]).
///
/// # Errors
/// Whatever `forward` returns; [`crate::error::Error::NonFinite`] (and no update) when the summed
/// gradient is not finite; [`crate::error::Error::Collective`] when a reduction fails.
pub(crate) fn group_gradient_step<V: Send>(
    optimizer: &mut AdamW,
    lr: f64,
    max_grad_norm: Option<f64>,
    group: &dyn Collective,
    figures: usize,
    forward: impl FnOnce() -> Result<Option<Part<V>>> + Send,
) -> Result<(Option<V>, Vec<f64>, StepStats)> {
    optimizer.set_learning_rate(lr);
    let opt = &*optimizer;
    let local = run_deep(move || -> Result<Option<Part<V, Vec<Option<Tensor>>>>> {
        match forward() {
            Ok(Some((loss, kept, figs))) => {
                let grads = loss.backward()?;
                Ok(Some((opt.gradients(&grads), kept, figs)))
            }
            Ok(None) => Ok(None),
            Err(e) => Err(e),
        }
    })?;
    if group.size() == 1 {
        let (grads, kept, figs) = local?.ok_or_else(|| {
            crate::error::Error::Training(
                "a group of one process has no rows in this minibatch".into(),
            )
        })?;
        let stats = optimizer.step_with(&grads, max_grad_norm)?;
        return Ok((Some(kept), figs, stats));
    }
    let (grads, kept, mut figs) = match local {
        Ok(Some((g, k, f))) => (Some(g), Some(k), f),
        Ok(None) => (None, None, vec![0.0; figures]),
        // Poison the sum so that every process skips this update together.
        Err(crate::error::Error::NonFinite { .. }) => (None, None, vec![f64::NAN; figures]),
        Err(e) => return Err(e),
    };
    figs.resize(figures, 0.0);
    let poisoned = figs.iter().any(|f| !f.is_finite());
    let summed = sum_gradients(optimizer, grads.as_deref(), poisoned, group)?;
    group.sum_f64(&mut figs)?;
    let stats = optimizer.step_with(&summed, max_grad_norm)?;
    Ok((kept, figs, stats))
}

/// Sums the gradients over `group` in one flat buffer (f32 when every variable is f32),
/// missing gradients counting as zero; `poisoned` fills this process's part with NaN.
fn sum_gradients(
    optimizer: &AdamW,
    grads: Option<&[Option<Tensor>]>,
    poisoned: bool,
    group: &dyn Collective,
) -> Result<Vec<Option<Tensor>>> {
    let vars: Vec<&Tensor> = optimizer.var_tensors().collect();
    let all_f32 = vars.iter().all(|v| v.dtype() == DType::F32);
    let mut flat = Vec::new();
    for (i, var) in vars.iter().enumerate() {
        let g = grads.and_then(|g| g.get(i).cloned().flatten());
        let values = match g {
            Some(g) if !poisoned => g.flatten_all()?.to_dtype(DType::F64)?.to_vec1::<f64>()?,
            _ => vec![if poisoned { f64::NAN } else { 0.0 }; var.elem_count()],
        };
        flat.extend(values);
    }
    if all_f32 {
        let mut buf: Vec<f32> = flat.iter().map(|&x| x as f32).collect();
        group.sum_f32(&mut buf)?;
        flat = buf.into_iter().map(f64::from).collect();
    } else {
        group.sum_f64(&mut flat)?;
    }
    let mut out = Vec::with_capacity(vars.len());
    let mut at = 0;
    for var in vars {
        let n = var.elem_count();
        let t = Tensor::from_slice(&flat[at..at + n], var.shape(), var.device())?
            .to_dtype(var.dtype())?;
        out.push(Some(t));
        at += n;
    }
    Ok(out)
}
