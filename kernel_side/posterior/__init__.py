"""The posterior type (Ensemble), its forward plans and input-gradient engine, and predictions."""
